"""DICOM reader against pydicom's bundled test files and series written by pydicom.

Sources: pydicom's bundled test files (``pydicom.data.get_testdata_file``:
MR_small.dcm, MR_small_RLE.dcm, MR_small_jpeg_ls_lossless.dcm, JPGExtended.dcm,
JPEG-lossy.dcm, MR_truncated.dcm, SC_rgb_jpeg_dcmtk.dcm) and the pydicom-data
package (emri_small.dcm, MR2_J2KI.dcm); pydicom's own decoders and Pillow's
JPEG parser are the references for pixel values and quantisation tables.
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pydicom
import pytest
from PIL import Image
from pydicom.data import get_testdata_file
from pydicom.encaps import generate_frames

from app.errors import InputError
from app.io import open_input
from app.io.dicom import UndecodablePixelsError, read_header_only
from app.io.jpeg_markers import parse_jpeg_markers


def _f(name: str) -> str:
    path = get_testdata_file(name)
    assert path is not None, f"{name} is not installed (pydicom / pydicom-data)"
    return path


def _write_series(folder: Path, n: int, *, spacing: float = 2.5, series_uid: str | None = None,
                  positions: bool = True, slope: float | None = None,
                  intercept: float | None = None, desc: str = "synthetic") -> list[np.ndarray]:
    """Write ``n`` slices derived from MR_small.dcm; slice k holds base + 100 * k.

    File names and InstanceNumbers are scrambled so only the positions give the
    true order (truth: ascending position along the slice normal).
    """
    base = pydicom.dcmread(_f("MR_small.dcm"))
    iop = np.array([float(v) for v in base.ImageOrientationPatient])
    normal = np.cross(iop[:3], iop[3:])
    origin = np.array([float(v) for v in base.ImagePositionPatient])
    uid = series_uid or pydicom.uid.generate_uid()
    truth = []
    order = np.random.default_rng(0).permutation(n)
    for k in range(n):
        ds = pydicom.dcmread(_f("MR_small.dcm"))
        arr = ds.pixel_array.astype(np.int16) + np.int16(100 * k)
        ds.PixelData = arr.tobytes()
        ds.SeriesInstanceUID = uid
        ds.SOPInstanceUID = pydicom.uid.generate_uid()
        ds.SeriesDescription = desc
        ds.InstanceNumber = int(n - k) if positions else int(k + 1)
        if positions:
            ds.ImagePositionPatient = [float(v) for v in origin + k * spacing * normal]
        else:
            del ds.ImagePositionPatient
        if slope is not None:
            ds.RescaleSlope = slope
            ds.RescaleIntercept = intercept
        ds.save_as(folder / f"f{order[k]:03d}.dcm")
        truth.append(arr)
    return truth


def test_single_file_matches_pydicom():
    """MR_small.dcm: stored values equal pydicom's pixel_array; spacing from PixelSpacing."""
    ds = pydicom.dcmread(_f("MR_small.dcm"))
    with open_input(_f("MR_small.dcm")) as loaded:
        (vol,) = loaded.volumes
        assert loaded.format == "dicom" and loaded.n_files == 1
        assert vol.dtype == np.int16 and vol.axes == ("rows", "cols")
        np.testing.assert_array_equal(np.asarray(vol.data), ds.pixel_array)
        assert vol.spacing == (0.3125, 0.3125)
        assert vol.header.fields["bits_stored"] == 16
        assert vol.header.fields["image_type"] == ["DERIVED", "SECONDARY", "OTHER"]
        assert vol.header.raw["Modality"] == "MR"


def test_series_ordered_by_position_on_normal(tmp_path):
    """Truth: slice k sits k * 2.5 mm along the normal and holds base + 100 k."""
    truth = _write_series(tmp_path, 6)
    with open_input(tmp_path) as loaded:
        (vol,) = loaded.volumes
        assert loaded.format == "dicom" and loaded.n_files == 6
        assert vol.shape == (6, 64, 64) and vol.axes == ("slices", "rows", "cols")
        np.testing.assert_array_equal(np.asarray(vol.data), np.stack(truth))
        assert vol.spacing[0] == pytest.approx(2.5, abs=1e-3)
        assert vol.affine is not None


def test_series_without_positions_uses_instance_number(tmp_path):
    """Truth: without ImagePositionPatient, InstanceNumber k + 1 holds base + 100 k."""
    truth = _write_series(tmp_path, 4, positions=False)
    with open_input(tmp_path) as loaded:
        np.testing.assert_array_equal(np.asarray(loaded.volumes[0].data), np.stack(truth))


def test_two_series_in_one_folder_are_two_groups(tmp_path):
    """Two SeriesInstanceUIDs in one folder give two Volumes (truth: 3 and 5 slices)."""
    a, b = tmp_path / "a", tmp_path / "b"
    a.mkdir()
    b.mkdir()
    _write_series(a, 3, desc="first")
    _write_series(b, 5, desc="second")
    for p in b.iterdir():
        p.rename(a / ("b_" + p.name))
    with open_input(a) as loaded:
        shapes = sorted(v.shape[0] for v in loaded.volumes)
        assert shapes == [3, 5]
        assert {v.name for v in loaded.volumes} == {"series 1 first", "series 1 second"}


def test_rescale_goes_to_scale_and_offset(tmp_path):
    """RescaleSlope 2, RescaleIntercept -100: stored ints stay, physical = 2 s - 100."""
    truth = _write_series(tmp_path, 3, slope=2.0, intercept=-100.0)
    with open_input(tmp_path) as loaded:
        vol = loaded.volumes[0]
        assert vol.dtype == np.int16
        assert (vol.scale, vol.offset) == (2.0, -100.0)
        np.testing.assert_allclose(vol.to_array(), np.stack(truth) * 2.0 - 100.0)


def test_multiframe_file():
    """emri_small.dcm (pydicom-data): 10 frames of 64 x 64, equal to pydicom's decoding."""
    ds = pydicom.dcmread(_f("emri_small.dcm"))
    with open_input(_f("emri_small.dcm")) as loaded:
        vol = loaded.volumes[0]
        assert vol.shape == (10, 64, 64)
        np.testing.assert_array_equal(np.asarray(vol.data), ds.pixel_array)
        assert vol.header.fields["lossy_compression"] is False


@pytest.mark.parametrize("name", ["MR_small_RLE.dcm", "MR_small_jpeg_ls_lossless.dcm"])
def test_lossless_compressed_equal_uncompressed(name):
    """RLE and JPEG-LS lossless copies of MR_small.dcm decode to its exact values."""
    ref = pydicom.dcmread(_f("MR_small.dcm")).pixel_array
    with open_input(_f(name)) as loaded:
        np.testing.assert_array_equal(np.asarray(loaded.volumes[0].data), ref)


def test_jpeg2000_lossy_decoded_with_rescale():
    """MR2_J2KI.dcm (pydicom-data): 1024 x 1024 JPEG 2000, RescaleSlope 3.774114."""
    with open_input(_f("MR2_J2KI.dcm")) as loaded:
        vol = loaded.volumes[0]
        assert vol.shape == (1024, 1024)
        assert vol.scale == pytest.approx(3.774114)
        assert vol.header.fields["transfer_syntax"] == "1.2.840.10008.1.2.4.91"
        assert vol.header.fields["lossy_compression"] is True


def test_jpeg_extended_decoded_and_tables_kept():
    """JPGExtended.dcm: 12-bit extended JPEG decodes to 1024 x 256 and keeps its DQT table."""
    with open_input(_f("JPGExtended.dcm")) as loaded:
        vol = loaded.volumes[0]
        assert vol.shape == (1024, 256)
        tables = vol.header.fields["jpeg_quant_tables"]
        assert len(tables) == 1 and tables[0][:8] == [19, 13, 12, 19, 28, 48, 61, 73]
        assert vol.header.fields["jpeg_precision"] == 12


def test_jpeg_tables_parsed_like_pillow():
    """SC_rgb_jpeg_dcmtk.dcm's encapsulated 8-bit JPEG stream: our DQT parser gives the
    same natural-order tables as Pillow's ``Image.quantization`` (libjpeg)."""
    ds = pydicom.dcmread(_f("SC_rgb_jpeg_dcmtk.dcm"))
    frame = next(generate_frames(ds.PixelData, number_of_frames=1))
    ours = parse_jpeg_markers(frame)
    with Image.open(io.BytesIO(frame)) as im:
        pil = im.quantization
    assert sorted(ours.tables) == sorted(pil)
    for k, table in ours.tables.items():
        assert table.reshape(64).tolist() == list(pil[k])
    assert ours.process == "baseline" and ours.precision == 8


def test_undecodable_jpeg_lossy_keeps_header_evidence():
    """JPEG-lossy.dcm (pydicom's test file): pylibjpeg cannot decode it
    (ENVIRONMENT-NOTES); the error names the transfer syntax (PS3.6: .4.51 is JPEG
    Extended, a lossy DCT process) and that the stream stores its quantisation tables
    (what they mean, an IJG quality, is the lossy_compression analyser's reading), and
    the header-only reader returns the same evidence."""
    with pytest.raises(UndecodablePixelsError) as info:
        with open_input(_f("JPEG-lossy.dcm")):
            pass
    err = info.value
    assert err.code == "undecodable_pixels"
    assert "1.2.840.10008.1.2.4.51" in err.message
    assert "declared lossy JPEG" in err.message
    n = len(err.header.fields["jpeg_quant_tables"])
    assert n >= 1 and f"{n} stored JPEG quantisation table" in err.message
    hdr = read_header_only(_f("JPEG-lossy.dcm"))
    assert hdr.fields["lossy_compression"] is True
    assert hdr.fields["jpeg_quant_tables"] == err.header.fields["jpeg_quant_tables"]
    assert hdr.fields["lossy_ratio"] == 76.0


def test_truncated_file_is_input_error(tmp_path):
    """MR_truncated.dcm (bundled) and a copy of MR_small.dcm cut in half: InputError."""
    with pytest.raises(InputError) as info:
        with open_input(_f("MR_truncated.dcm")):
            pass
    assert info.value.code == "truncated_dicom"
    cut = tmp_path / "cut.dcm"
    cut.write_bytes(Path(_f("MR_small.dcm")).read_bytes()[:5000])
    with pytest.raises(InputError) as info:
        with open_input(cut):
            pass
    assert info.value.code == "truncated_dicom" and "cut.dcm" in info.value.message


def test_declared_size_checked_before_reading(tmp_path):
    """A limit below MR_small's declared 64 x 64 x 2 bytes refuses it before decoding."""
    from app.config import Limits

    with pytest.raises(InputError) as info:
        with open_input(_f("MR_small.dcm"), limits=Limits(max_array_bytes=4096)):
            pass
    assert info.value.code == "too_large"


def test_undecodable_file_in_folder_becomes_warning(tmp_path):
    """A folder with a readable series and JPEG-lossy.dcm: the series is analysed and the
    other file's header evidence reaches the warnings."""
    _write_series(tmp_path, 2)
    (tmp_path / "lossy.dcm").write_bytes(Path(_f("JPEG-lossy.dcm")).read_bytes())
    with open_input(tmp_path) as loaded:
        assert [v.shape for v in loaded.volumes] == [(2, 64, 64)]
        assert any("lossy.dcm" in w and "stored JPEG quantisation table" in w
                   for w in loaded.warnings)


@pytest.mark.parametrize("signed", [False, True])
def test_stack_applies_bits_stored_like_pydicom(tmp_path, signed):
    """Uncompressed series copied from the bytes: bits above BitsStored = 12 are masked
    (unsigned) or sign-extended (signed) exactly as pydicom's pixel_array does."""
    rng = np.random.default_rng(5)
    refs = []
    for k in range(3):
        ds = pydicom.dcmread(_f("MR_small.dcm"))
        raw = rng.integers(0, 1 << 16, size=(64, 64), dtype=np.uint16)
        ds.PixelRepresentation = int(signed)
        ds.BitsStored, ds.HighBit = 12, 11
        ds.PixelData = raw.tobytes()
        ds.InstanceNumber = k + 1
        ds.SOPInstanceUID = pydicom.uid.generate_uid()
        ds.ImagePositionPatient = [0.0, 0.0, float(k)]
        ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
        ds.save_as(tmp_path / f"s{k}.dcm")
        refs.append(pydicom.dcmread(tmp_path / f"s{k}.dcm").pixel_array)
    with open_input(tmp_path) as loaded:
        data = np.asarray(loaded.volumes[0].data)
    assert data.dtype == refs[0].dtype
    np.testing.assert_array_equal(data, np.stack(refs))


@pytest.mark.parametrize("coded,reference", [
    ("MR2_J2KI.dcm", "MR2_UNCI.dcm"),
    ("MR2_J2KR.dcm", "MR2_UNCR.dcm"),
    ("emri_small_jpeg_2k_lossless.dcm", "emri_small.dcm"),
    ("emri_small_RLE.dcm", "emri_small.dcm"),
    ("emri_small_big_endian.dcm", "emri_small.dcm"),
])
def test_compressed_equal_their_uncompressed_references(coded, reference):
    """pydicom-data ships each coded file beside its decoded reference (UNCI/UNCR, the
    uncompressed emri_small): the decoded stored values are identical."""
    with open_input(_f(coded)) as a, open_input(_f(reference)) as b:
        np.testing.assert_array_equal(a.volumes[0].to_array(scaled=False),
                                      b.volumes[0].to_array(scaled=False))


def test_data_set_cut_short_is_truncated():
    """emri_small_jpeg_2k_lossless_too_short.dcm (pydicom-data) ends inside its data set."""
    with pytest.raises(InputError) as info:
        with open_input(_f("emri_small_jpeg_2k_lossless_too_short.dcm")):
            pass
    assert info.value.code == "truncated_dicom"


def _enhanced(tmp_path: Path) -> tuple[Path, np.ndarray]:
    """A 3-frame file built from emri_small.dcm (Enhanced MR) with functional groups:
    shared PixelSpacing 0.5 mm, MR FOV/Geometry 128 frequency x 96 phase steps (COL),
    and per-frame positions at z = 2, 0, 1 (truth: sorted order is frames 1, 2, 0)."""
    from pydicom.dataset import Dataset
    from pydicom.sequence import Sequence

    ds = pydicom.dcmread(_f("emri_small.dcm"))
    frames = ds.pixel_array[:3].copy()
    ds.NumberOfFrames = 3
    ds.PixelData = frames.tobytes()
    pm, geo, ori = Dataset(), Dataset(), Dataset()
    pm.PixelSpacing = [0.5, 0.5]
    geo.InPlanePhaseEncodingDirection = "COL"
    geo.MRAcquisitionFrequencyEncodingSteps = 128
    geo.MRAcquisitionPhaseEncodingStepsInPlane = 96
    ori.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
    shared = Dataset()
    shared.PixelMeasuresSequence = Sequence([pm])
    shared.MRFOVGeometrySequence = Sequence([geo])
    shared.PlaneOrientationSequence = Sequence([ori])
    ds.SharedFunctionalGroupsSequence = Sequence([shared])
    per = []
    for z in (2.0, 0.0, 1.0):
        pos, item = Dataset(), Dataset()
        pos.ImagePositionPatient = [0.0, 0.0, z]
        item.PlanePositionSequence = Sequence([pos])
        per.append(item)
    ds.PerFrameFunctionalGroupsSequence = Sequence(per)
    path = tmp_path / "enhanced.dcm"
    ds.save_as(path)
    return path, frames


def test_enhanced_multiframe_functional_groups(tmp_path):
    """Functional-group spacing, acquisition matrix and per-frame positions are used."""
    path, frames = _enhanced(tmp_path)
    with open_input(path) as loaded:
        vol = loaded.volumes[0]
        np.testing.assert_array_equal(np.asarray(vol.data), frames[[1, 2, 0]])
        assert vol.header.fields["pixel_spacing"] == [0.5, 0.5]
        assert vol.header.fields["acquisition_matrix"] == [128, 0, 0, 96]
        assert vol.spacing[-2:] == (0.5, 0.5)


def test_files_without_suffix_or_meta(tmp_path):
    """A DICOM file named without suffix (IM0001) is recognised by its 'DICM' magic;
    ExplVR_LitEndNoMeta.dcm (bundled, no meta header, an RT plan) is named as DICOM
    without pixels; MR_small_bigendian.dcm reads in native byte order with the values
    of MR_small.dcm."""
    (tmp_path / "IM0001").write_bytes(Path(_f("MR_small.dcm")).read_bytes())
    with open_input(tmp_path / "IM0001") as loaded:
        assert loaded.format == "dicom"
    with pytest.raises(InputError) as info:
        with open_input(_f("ExplVR_LitEndNoMeta.dcm")):
            pass
    assert info.value.code == "no_pixel_data"
    with open_input(_f("MR_small_bigendian.dcm")) as loaded:
        data = np.asarray(loaded.volumes[0].data)
        assert data.dtype.isnative
        np.testing.assert_array_equal(data, pydicom.dcmread(_f("MR_small.dcm")).pixel_array)


def test_repeated_positions_become_a_time_axis(tmp_path):
    """Truth: 3 positions x 2 repetitions (InstanceNumber orders the repetitions); slice
    at position p, repetition t holds base + 100 p + 1000 t -> shape (2, 3, 64, 64)."""
    base = pydicom.dcmread(_f("MR_small.dcm"))
    ref = base.pixel_array.astype(np.int16)
    uid = pydicom.uid.generate_uid()
    n = 0
    for t in range(2):
        for p in (2, 0, 1):
            ds = pydicom.dcmread(_f("MR_small.dcm"))
            ds.PixelData = (ref + np.int16(100 * p + 1000 * t)).tobytes()
            ds.SeriesInstanceUID = uid
            ds.InstanceNumber = 1 + p + 3 * t
            ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
            ds.ImagePositionPatient = [0.0, 0.0, 3.0 * p]
            ds.save_as(tmp_path / f"x{n}.dcm")
            n += 1
    with open_input(tmp_path) as loaded:
        vol = loaded.volumes[0]
        assert vol.shape == (2, 3, 64, 64) and vol.axes == ("time", "slices", "rows", "cols")
        for t in range(2):
            for p in range(3):
                np.testing.assert_array_equal(vol.data[t, p], ref + 100 * p + 1000 * t)
        assert vol.spacing[1] == pytest.approx(3.0)


def test_jpeg_baseline_colour_decoded_to_luminance():
    """SC_rgb_jpeg_dcmtk.dcm (bundled, JPEG baseline .50, YBR_FULL_422): decoded by
    pydicom's handlers and converted to luma; Pillow's convert("L") of pydicom's RGB
    output is the reference (within 1 grey level: Pillow rounds in fixed point)."""
    ds = pydicom.dcmread(_f("SC_rgb_jpeg_dcmtk.dcm"))
    ref = np.asarray(Image.fromarray(ds.pixel_array, "RGB").convert("L")).astype(int)
    with open_input(_f("SC_rgb_jpeg_dcmtk.dcm")) as loaded:
        vol = loaded.volumes[0]
        assert vol.header.fields["transfer_syntax"] == "1.2.840.10008.1.2.4.50"
        assert vol.dtype == np.uint8 and vol.shape == (100, 100)
        assert np.abs(np.asarray(vol.data).astype(int) - ref).max() <= 1
        assert any("luminance" in w for w in loaded.warnings)
