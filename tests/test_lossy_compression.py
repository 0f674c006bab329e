"""The lossy_compression analyser (app/traces/lossy_compression.py).

Outside references:
- Pillow's JPEG encoder (libjpeg), greyscale, qualities 10-95: the truth is the
  quality passed to it, and its table is app/traces/jpeg_tables.scaled_table
  (checked against Pillow's DQT segments in tests/test_jpeg_tables.py).
- pydicom's bundled files: MR_small.dcm (real MR pixels, uncompressed),
  JPGExtended.dcm (12-bit extended JPEG, decoded here by pylibjpeg through
  pydicom), JPEG-lossy.dcm (same kind, not decodable by the installed plugins),
  JPEG2000.dcm (lossy JPEG 2000); pydicom-data's emri_small.dcm (10 MR frames) and
  MR-SIEMENS-DICOM-WithOverlays.dcm. The tables stored in the JPEG streams are read
  by a small DQT parser written here from ITU-T T.81 B.2.4.1.
- DICOM PS3.5 section 10: transfer syntax 1.2.840.10008.1.2.4.51 is JPEG extended
  (lossy), 1.2.840.10008.1.2.4.91 JPEG 2000 (lossy or lossless); PS3.3
  C.7.6.1.1.5: Lossy Image Compression "01" / "00".
Synthetic images come from demo_data/synth.py; each test states the truth it built.
"""

from __future__ import annotations

import io
import json
import struct

import numpy as np
import pydicom
import pytest
from PIL import Image
from pydicom.data import get_testdata_file
from pydicom.encaps import generate_frames
from scipy import ndimage

from app.io.volume import Header, Volume
from app.traces import lossy_compression
from app.traces.header import HeaderFacts
from app.traces.jpeg_tables import match_quality, natural_from_zigzag, scaled_table
from app.traces.plan import execute, step_of, trace_of
from app.traces.report import analyse_volume
from demo_data import synth
from demo_data.synth import jpeg_round_trip as _jpeg
from demo_data.synth import png_round_trip as _png

JPEG_EXTENDED = "1.2.840.10008.1.2.4.51"
JPEG_2000 = "1.2.840.10008.1.2.4.91"


# ----- helpers ---------------------------------------------------------------
def _mr_float(seed: int, shape: tuple[int, int] = (192, 192), coils: int = 4) -> np.ndarray:
    return synth.rss(synth.acquire(shape, n_coils=coils, sigma=0.01, seed=seed), axis=1)[0]


def _to8(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    return np.round((a - a.min()) / (a.max() - a.min()) * 255).astype(np.uint8)




def _trace(arr: np.ndarray | Volume, **options) -> dict:
    vol = arr if isinstance(arr, Volume) else Volume.from_array(arr)
    return trace_of("lossy_compression", vol, workers=1, options=dict(options)).to_dict()


def _dqt_luminance(stream: bytes) -> np.ndarray:
    """First quantisation table of a JPEG stream, natural order (T.81 B.2.4.1)."""
    i = 2
    while i + 4 <= len(stream):
        marker = stream[i + 1]
        length = struct.unpack(">H", stream[i + 2:i + 4])[0]
        if marker == 0xDB:
            seg = stream[i + 4:i + 2 + length]
            pq = seg[0] >> 4
            vals = struct.unpack(">64H", seg[1:129]) if pq else list(seg[1:65])
            return natural_from_zigzag(vals)
        i += 2 + length
    raise AssertionError("no DQT segment")


def _stored_table(name: str) -> tuple[pydicom.Dataset, np.ndarray]:
    ds = pydicom.dcmread(get_testdata_file(name))
    frame = next(generate_frames(ds.PixelData, number_of_frames=1))
    return ds, _dqt_luminance(frame)


def _reader_header(ds: pydicom.Dataset, table: np.ndarray | None) -> Header:
    """The normalised fields a DICOM reader puts in Volume.header (see volume.Header)."""
    fields = {
        "transfer_syntax": str(ds.file_meta.TransferSyntaxUID),
        "lossy_compression": {"01": True, "00": False}.get(ds.get("LossyImageCompression")),
        "bits_stored": int(ds.BitsStored),
    }
    if table is not None:
        fields["jpeg_quant_tables"] = [table.ravel().tolist()]
    return Header(fields=fields)


def _measured_agree(trace: dict, truth: np.ndarray) -> tuple[int, float]:
    est = np.array([[np.nan if v is None else v for v in row]
                    for row in trace["evidence"]["estimated_table"]], dtype=float)
    m = np.isfinite(est) & (est > 1)
    return int(m.sum()), float(np.mean(est[m] == truth[m])) if m.any() else 0.0


def _tolerance(quality: int) -> int:
    return 3 if quality >= 95 else 5


# ----- JPEG found in the pixels -----------------------------------------------
@pytest.mark.parametrize("quality", list(range(10, 96, 5)))
def test_pillow_jpeg_quality_synthetic_mr(quality: int) -> None:
    """Truth: simulated 4-coil root-sum-of-squares magnitude, 8 bits, Pillow JPEG at
    `quality`, decoded. Present, method jpeg_dct, quality within 5 (within 3 at 95),
    block origin [0, 0], and at least 90 % of the measured table entries equal the
    libjpeg table."""
    dec = _jpeg(_to8(_mr_float(quality)), quality)
    t = _trace(dec)
    assert t["status"] == "present"
    est = t["estimates"]
    assert est["method"] == "jpeg_dct"
    assert est["quality"] is not None and abs(est["quality"] - quality) <= _tolerance(quality)
    assert est["block_origin"] == [0, 0]
    n, agree = _measured_agree(t, scaled_table(quality))
    assert n >= 5 and agree >= 0.9


@pytest.mark.parametrize("quality", list(range(10, 96, 5)))
def test_pillow_jpeg_quality_real_mr_small(quality: int) -> None:
    """Truth: pydicom's MR_small.dcm (real MR, 64 x 64) scaled to 8 bits, Pillow JPEG
    at `quality`. Present with quality within 5 (3 at 95) of the truth."""
    a8 = _to8(pydicom.dcmread(get_testdata_file("MR_small.dcm")).pixel_array)
    t = _trace(_jpeg(a8, quality))
    assert t["status"] == "present" and t["estimates"]["method"] == "jpeg_dct"
    q = t["estimates"]["quality"]
    assert q is not None and abs(q - quality) <= _tolerance(quality)


@pytest.mark.parametrize("quality", [20, 60, 90])
def test_pillow_jpeg_real_mr_volumes(quality: int) -> None:
    """Truth: pydicom-data's emri_small.dcm (10 real MR frames) and
    MR-SIEMENS-DICOM-WithOverlays.dcm, each frame scaled to 8 bits and compressed
    at `quality`, delivered as decoded and linearly rescaled to 12 bits in uint16.
    Present, quality within 5."""
    for name in ("emri_small.dcm", "MR-SIEMENS-DICOM-WithOverlays.dcm"):
        a = pydicom.dcmread(get_testdata_file(name)).pixel_array
        a8 = _to8(a).reshape(-1, *a.shape[-2:])
        dec = np.stack([_jpeg(f, quality) for f in a8])
        # as decoded, and converted back to 12 bits stored in uint16 (round(a k + b))
        for arr in (dec, np.round(4095 / 255 * dec.astype(float) + 11).astype(np.uint16)):
            t = _trace(arr)
            assert t["status"] == "present", name
            assert abs(t["estimates"]["quality"] - quality) <= 5, name


def test_png_resave_rescale_and_crop() -> None:
    """Truth: one quality-70 JPEG delivered (a) re-saved as PNG, (b) linearly
    rescaled to 12 bits in uint16 (round(4095/255 k + 200)), (c) scaled to float32
    0..1, (d) cropped by 3 rows and 5 columns, re-saved as PNG. Each gives quality
    within 5 of 70; (a-c) block origin [0, 0], (d) [5, 3] (the contract's example)."""
    dec = _jpeg(_to8(_mr_float(70, (160, 192))), 70)
    cases = {
        "png": (_png(dec), [0, 0]),
        "uint16": (np.round(4095 / 255 * dec.astype(float) + 200).astype(np.uint16), [0, 0]),
        "float": ((dec / 255.0).astype(np.float32), [0, 0]),
        "crop": (_png(dec[3:, 5:]), [5, 3]),
    }
    for name, (arr, origin) in cases.items():
        t = _trace(arr)
        assert t["status"] == "present", name
        assert abs(t["estimates"]["quality"] - 70) <= 5, name
        assert t["estimates"]["block_origin"] == origin, name
    lat = _trace(cases["uint16"][0])["evidence"]["pixels"]["lattice"]
    assert abs(lat["a"] - 4095 / 255) < 0.01


def test_nonlinear_map_is_inconclusive() -> None:
    """Truth: a quality-50 JPEG whose grey levels went through a square root
    before storage (no affine lattice). The analyser says inconclusive and why
    (the brief: undo an affine map or say inconclusive with the reason)."""
    dec = _jpeg(_to8(_mr_float(8)), 50)
    t = _trace(np.sqrt(dec.astype(np.float64) * 100.0).astype(np.float32))
    assert t["status"] == "inconclusive"
    assert "lattice" in t["summary"]


# ----- uncompressed data must not be called JPEG --------------------------------
def _zero_filled(seed: int) -> np.ndarray:
    mag, _ = synth.zero_filled_magnitude((96, 96), (2.0, 2.0), n_coils=4, n_slices=1, seed=seed)
    return mag[0]


UNCOMPRESSED = {
    "raw float magnitude": lambda: _mr_float(21),
    "raw uint16": lambda: np.round(_mr_float(22) / _mr_float(22).max() * 4000).astype(np.uint16),
    "8-bit quantised": lambda: _to8(_mr_float(23)),
    "zero-filled float": lambda: _zero_filled(24),
    "zero-filled 8-bit": lambda: _to8(_zero_filled(25)),
    "zoom x2 8-bit": lambda: _to8(np.clip(ndimage.zoom(_mr_float(26, (128, 128)), 2.0), 0, None)),
    "zoom x1.5 8-bit": lambda: _to8(np.clip(ndimage.zoom(_mr_float(27, (128, 128)), 1.5), 0, None)),
    "MR_small int16": lambda: pydicom.dcmread(get_testdata_file("MR_small.dcm")).pixel_array,
    "MR-SIEMENS uint16": lambda: pydicom.dcmread(
        get_testdata_file("MR-SIEMENS-DICOM-WithOverlays.dcm")).pixel_array,
    "MR_small 8-bit": lambda: _to8(pydicom.dcmread(get_testdata_file("MR_small.dcm")).pixel_array),
}


@pytest.mark.parametrize("kind", list(UNCOMPRESSED))
def test_uncompressed_is_absent(kind: str) -> None:
    """Truth: never JPEG-compressed (raw-like, zero-filled magnitude, 8-bit
    quantised, spline-resampled with scipy.ndimage.zoom, real uncompressed MR from
    pydicom). Status absent, no method, no quality."""
    t = _trace(UNCOMPRESSED[kind]())
    assert t["status"] == "absent", t["summary"]
    assert t["estimates"] == {"method": None, "quality": None, "block_origin": None}


def test_complex_and_kspace_are_absent() -> None:
    """Complex images and k-space cannot have come out of a JPEG decoder (common
    practice, no source: JPEG codes real samples of 8 or 12 bits)."""
    imgs = synth.acquire((64, 64), n_coils=2, seed=30)[0]
    assert _trace(Volume.from_array(imgs, coil_axis=0))["status"] == "absent"
    k = Volume.from_array(synth.to_kspace(imgs), domain="kspace", coil_axis=0)
    assert _trace(k)["status"] == "absent"


# ----- real JPEG-compressed DICOM ---------------------------------------------------
def test_jpg_extended_pixels_against_stored_table() -> None:
    """JPGExtended.dcm: 12-bit extended JPEG. Truth: the table in its JPEG stream
    (DQT, 16-bit precision allowed). From the decoded pixels: present, method
    jpeg_dct, every measured step (> 1) equal to the stored entry, at least 15
    measured, quality within 5 of the stored table's IJG quality; with the header
    set as a reader would (transfer syntax .51, Lossy Image Compression 01) both
    agree and no disagreement is flagged."""
    ds, table = _stored_table("JPGExtended.dcm")
    stored_q, stored_err, _ = match_quality(table, baseline=table.max() <= 255)
    assert stored_err < 0.05  # an IJG-like scaling of Annex K
    px = ds.pixel_array
    vol = Volume.from_array(px, format="dicom", header=_reader_header(ds, table))
    t = _trace(vol)
    assert t["status"] == "present" and t["estimates"]["method"] == "jpeg_dct"
    n, agree = _measured_agree(t, table)
    assert n >= 15 and agree == 1.0
    assert abs(t["estimates"]["quality"] - stored_q) <= 5
    assert t["evidence"]["header"]["declared"] is True
    assert t["evidence"]["header"]["stored_quality"] == stored_q
    assert t["evidence"]["disagreement"] is None


def test_jpeg_lossy_dcm_header_only() -> None:
    """JPEG-lossy.dcm does not decode with the installed plugins (shared notes), so
    the reader has only its header and stream tables; the pixels given here are a
    constant placeholder. Truth: transfer syntax .51, Lossy Image Compression 01,
    the DQT table of its stream. Present, method declared, quality = the stored
    table's matched IJG quality, via Volume.header.fields and, separately, via the
    header step's declared facts handed to the analyser directly."""
    ds, table = _stored_table("JPEG-lossy.dcm")
    assert str(ds.file_meta.TransferSyntaxUID) == JPEG_EXTENDED
    stored_q, _, _ = match_quality(table, baseline=table.max() <= 255)
    placeholder = np.zeros((int(ds.Rows), int(ds.Columns)), dtype=np.uint16)
    vol = Volume.from_array(placeholder, format="dicom", header=_reader_header(ds, table))
    t = _trace(vol)
    assert t["status"] == "present"
    assert t["estimates"] == {"method": "declared", "quality": stored_q, "block_origin": None}
    assert t["evidence"]["header"]["stored_table"] == table.tolist()
    baseline = bool(table.max() <= 255)
    assert t["evidence"]["matched_table"] == scaled_table(stored_q, baseline=baseline).tolist()
    declared = {"lossy_compression": True, "transfer_syntax": JPEG_EXTENDED,
                "lossy_method": "ISO_10918_1", "stored_jpeg_quality": stored_q,
                "stored_jpeg_table": table.tolist()}
    bare = Volume.from_array(placeholder)
    t2 = lossy_compression.analyse_lossy_compression(
        bare, header=HeaderFacts(declared), jpeg_pixels=step_of("jpeg_pixels", bare)).to_dict()
    assert t2["status"] == "present" and t2["estimates"]["quality"] == stored_q
    assert "ISO_10918_1" in t2["summary"]


def test_header_says_lossless_pixels_say_jpeg() -> None:
    """Truth: a quality-40 JPEG delivered with a header that declares no lossy
    compression (Lossy Image Compression 00). Reported as jpeg_dct from the pixels,
    with the disagreement flagged."""
    dec = _jpeg(_to8(_mr_float(40)), 40)
    vol = Volume.from_array(dec, header=Header(fields={"lossy_compression": False}))
    t = _trace(vol)
    assert t["status"] == "present" and t["estimates"]["method"] == "jpeg_dct"
    assert "declares no lossy compression" in (t["evidence"]["disagreement"] or "")
    assert abs(t["estimates"]["quality"] - 40) <= 5


def test_stored_quality_differs_from_pixels() -> None:
    """Truth: pixels compressed at quality 30 but a header table of quality 90
    (compressed twice, or the header copied over). Both reported; disagreement
    names the two qualities."""
    dec = _jpeg(_to8(_mr_float(31)), 30)
    header = Header(fields={"lossy_compression": True,
                            "jpeg_quant_tables": [scaled_table(90).ravel().tolist()]})
    t = _trace(Volume.from_array(dec, header=header))
    assert t["estimates"]["method"] == "jpeg_dct"
    assert abs(t["estimates"]["quality"] - 30) <= 5
    assert t["evidence"]["header"]["stored_quality"] == 90
    assert "90" in t["evidence"]["disagreement"]


def test_jpeg2000_lossy_from_header() -> None:
    """JPEG2000.dcm: lossy JPEG 2000 (transfer syntax .91, Lossy Image Compression
    01), decoded by pylibjpeg-openjpeg. No 8 x 8 grid in the pixels; the header
    makes it present with method declared and no quality, and no disagreement is
    flagged (JPEG 2000 leaves no block grid). With the lossy flag missing, the
    same file is inconclusive, not absent."""
    ds = pydicom.dcmread(get_testdata_file("JPEG2000.dcm"))
    assert str(ds.file_meta.TransferSyntaxUID) == JPEG_2000
    px = ds.pixel_array
    t = _trace(Volume.from_array(px, format="dicom", header=_reader_header(ds, None)))
    assert t["status"] == "present"
    assert t["estimates"] == {"method": "declared", "quality": None, "block_origin": None}
    assert t["evidence"]["disagreement"] is None and "JPEG 2000" in t["summary"]
    silent = Header(fields={"transfer_syntax": JPEG_2000})
    assert _trace(Volume.from_array(px, header=silent))["status"] == "inconclusive"


# ----- the report mechanism -----------------------------------------------------
def test_report_carries_contract_and_evidence_keys() -> None:
    """Through app.traces.report.analyse_volume: the trace is contract-shaped
    (shared/REPORT_CONTRACT.md) with the agreed evidence keys (shared evidence
    list), JSON-serialisable; the matched table is Annex K scaled to the quality.
    Truth: quality-55 JPEG cropped by 1 row and 2 columns -> origin [7, 6]."""
    dec = _jpeg(_to8(_mr_float(55)), 55)[1:, 2:]
    rep = analyse_volume(Volume.from_array(np.ascontiguousarray(dec)), workers=1)
    t = rep["traces"]["lossy_compression"]
    assert t["status"] == "present" and rep["verdict"] == "processed"
    ev = t["evidence"]
    assert len(ev["blocking_signature"]["rows"]) == 8 and len(ev["blocking_signature"]["cols"]) == 8
    assert np.array(ev["estimated_table"], dtype=float).shape == (8, 8)
    q = t["estimates"]["quality"]
    assert abs(q - 55) <= 5
    assert ev["matched_table"] == scaled_table(q).tolist()
    assert ev["block_origin"] == t["estimates"]["block_origin"] == [7, 6]
    assert set(ev["header"]) >= {"declared", "transfer_syntax", "stored_quality", "stored_table"}
    assert "disagreement" in ev and isinstance(ev["fit_error"], float)
    json.dumps(t, allow_nan=False)


def test_large_volume_uses_stated_frame_subset() -> None:
    """A 20-frame volume is measured on 8 evenly spaced frames and the report notes
    it (the brief: state subsampling in the report's notes). Truth: every frame a
    quality-45 JPEG; present with quality within 5."""
    frames = [_jpeg(_to8(_mr_float(100 + i, (64, 64), coils=2)), 45) for i in range(20)]
    vol = Volume.from_array(np.stack(frames))
    res = execute(vol, only=["lossy_compression"])
    t = res.traces["lossy_compression"].to_dict()
    assert len(t["evidence"]["pixels"]["frames"]) == 8
    assert any("8 of 20 frames" in n for n in res.notes)
    assert t["status"] == "present" and abs(t["estimates"]["quality"] - 45) <= 5


def test_jpeg2000_decoded_pixels_without_header_are_inconclusive() -> None:
    """pydicom-data's MR2_UNCI.dcm holds the pixels of MR2_J2KI.dcm (JPEG 2000
    irreversible, 18:1, per its Derivation Description) stored uncompressed; the
    original is MR2_UNCR.dcm. Truth: from the pixels alone, the lossy one is not
    called absent (the wavelet deadzone makes it inconclusive), the original is
    absent; with UNCI's header as a reader gives it (Lossy Image Compression 01) the
    trace is present, declared."""
    unci = pydicom.dcmread(get_testdata_file("MR2_UNCI.dcm"))
    uncr = pydicom.dcmread(get_testdata_file("MR2_UNCR.dcm"))
    t = _trace(unci.pixel_array)
    assert t["status"] == "inconclusive" and "deadzone" in t["summary"]
    assert _trace(uncr.pixel_array)["status"] == "absent"
    declared = _trace(Volume.from_array(unci.pixel_array, header=_reader_header(unci, None)))
    assert declared["status"] == "present" and declared["estimates"]["method"] == "declared"


def test_pillow_jpeg2000_never_called_jpeg() -> None:
    """Truth: synthetic MR through Pillow's JPEG 2000 encoder (OpenJPEG, irreversible,
    10:1), re-saved as PNG. No 8 x 8 grid: never present from the pixels; here the
    deadzone rule makes it inconclusive."""
    buf = io.BytesIO()
    Image.fromarray(_to8(_mr_float(50, (256, 256))), "L").save(
        buf, "JPEG2000", quality_mode="rates", quality_layers=[10], irreversible=True)
    buf.seek(0)
    t = _trace(_png(np.asarray(Image.open(buf))))
    assert t["status"] == "inconclusive"
    assert t["estimates"]["method"] is None


def test_jpeg_lossy_dcm_through_the_reader() -> None:
    """End to end through app.analysis.analyse_path and the DICOM reader:
    JPEG-lossy.dcm's pixels do not decode (shared notes), so the trace comes from the
    header: present, method declared, quality = the IJG quality matched to the DQT
    table of its JPEG stream (parsed here, T.81 B.2.4.1)."""
    from app.analysis import analyse_path

    _, table = _stored_table("JPEG-lossy.dcm")
    stored_q, _, _ = match_quality(table, baseline=bool(table.max() <= 255))
    rep = analyse_path(get_testdata_file("JPEG-lossy.dcm"), workers=1)
    t = rep["traces"]["lossy_compression"]
    assert t["status"] == "present"
    assert t["estimates"] == {"method": "declared", "quality": stored_q, "block_origin": None}
    assert rep["verdict"] == "processed"
