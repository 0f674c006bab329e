"""The normalised provenance fields of a DICOM data set (the reader's ``Header``).

References
----------
NEMA PS3.3, C.7.6.1 General Image Module (ImageType, LossyImageCompression),
C.8.3.1 MR Image Module (AcquisitionMatrix, InPlanePhaseEncodingDirection,
PercentPhaseFieldOfView, PercentSampling), C.7.6.16 Multi-frame Functional Groups.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from app.io.dicom_dataset import read_dataset, transfer_syntax_of
from app.io.dicom_syntax import JPEG_DCT_SYNTAXES, syntax_of
from app.io.jpeg_markers import parse_jpeg_markers
from app.io.volume import Header

__all__ = ["float_or_none", "header_fields", "int_or_none", "mosaic_count", "read_header_only",
           "shared_item"]

_RAW_SKIP = {"PixelData", "FloatPixelData", "DoubleFloatPixelData", "OverlayData"}


def _text(value: Any) -> str:
    s = str(value)
    return s if len(s) <= 200 else s[:197] + "..."


def float_or_none(value: Any) -> float | None:
    if value is None or value == "":
        return None
    if not isinstance(value, str | bytes) and hasattr(value, "__len__"):
        if len(value) == 0:
            return None
        value = value[0]
    try:
        return float(value)
    except (TypeError, ValueError):
        return None


def int_or_none(value: Any) -> int | None:
    f = float_or_none(value)
    return None if f is None else int(f)


def _jpeg_tables(ds: Any) -> tuple[list[list[int]], dict[str, Any]]:
    """Quantisation tables of the first encapsulated JPEG frame (natural order)."""
    from pydicom.encaps import generate_frames

    try:
        n_frames = int(ds.get("NumberOfFrames", 1) or 1)
        frame = next(generate_frames(ds.PixelData, number_of_frames=n_frames))
        m = parse_jpeg_markers(frame)
    except Exception:  # noqa: BLE001 - a stream we cannot parse simply has no table evidence
        return [], {}
    lum = m.luminance_table()
    order = sorted(m.tables)
    if lum is not None:
        order = sorted(order, key=lambda k: m.tables[k] is not lum)
    tables = [m.tables[k].reshape(64).astype(int).tolist() for k in order]
    return tables, {"jpeg_process": m.process, "jpeg_precision": m.precision}


def _syntax_name(uid: str) -> str:
    """The transfer syntax's name: the project's table, else pydicom's dictionary, else the UID."""
    entry = syntax_of(uid)
    if entry is not None:
        return entry.name
    from pydicom.uid import UID

    try:
        return str(UID(uid).name)
    except Exception:  # noqa: BLE001 - a malformed UID is simply shown as it is
        return uid


def header_fields(ds: Any) -> Header:
    """Normalised provenance fields and a raw summary of one dataset.

    Parameters
    ----------
    ds : pydicom.Dataset

    Returns
    -------
    Header
        ``fields`` uses the keys documented in :class:`app.io.volume.Header`.
    """
    f: dict[str, Any] = {}
    ts = transfer_syntax_of(ds)
    f["transfer_syntax"] = ts
    f["transfer_syntax_name"] = _syntax_name(ts)
    it = ds.get("ImageType")
    if it is not None:
        vals = [str(v) for v in (it if not isinstance(it, str) else it.split("\\"))]
        f["image_type"] = vals
    lic = ds.get("LossyImageCompression")
    if lic is not None and str(lic).strip() != "":
        f["lossy_compression"] = str(lic).strip() == "01"
    ratio = ds.get("LossyImageCompressionRatio")
    if ratio not in (None, ""):
        vals = ratio if not isinstance(ratio, str | float | int) else [ratio]
        try:
            f["lossy_ratio"] = float(list(vals)[0])
        except (TypeError, ValueError, IndexError):
            pass
    method = ds.get("LossyImageCompressionMethod")
    if method not in (None, ""):
        m = method if isinstance(method, str) else "\\".join(str(v) for v in method)
        f["lossy_method"] = m
    am = ds.get("AcquisitionMatrix")
    if am is not None and len(am) == 4:
        f["acquisition_matrix"] = [int(v) for v in am]
    f["rows"] = int(ds.get("Rows", 0) or 0)
    f["columns"] = int(ds.get("Columns", 0) or 0)
    for key, name in (
        ("InPlanePhaseEncodingDirection", "phase_encoding_direction"),
        ("DerivationDescription", "derivation_description"),
        ("Modality", "modality"),
        ("Manufacturer", "manufacturer"),
        ("PhotometricInterpretation", "photometric_interpretation"),
    ):
        v = ds.get(key)
        if v not in (None, ""):
            f[name] = str(v).strip()
    for key, name in (("PercentPhaseFieldOfView", "percent_phase_fov"),
                      ("PercentSampling", "percent_sampling"),
                      ("RescaleSlope", "rescale_slope"),
                      ("RescaleIntercept", "rescale_intercept")):
        v = float_or_none(ds.get(key))
        if v is not None:
            f[name] = v
    for key, name in (("BitsStored", "bits_stored"), ("BitsAllocated", "bits_allocated"),
                      ("PixelRepresentation", "pixel_representation"),
                      ("SamplesPerPixel", "samples_per_pixel")):
        v = int_or_none(ds.get(key))
        if v is not None:
            f[name] = v
    ps = ds.get("PixelSpacing")
    if ps is not None and len(ps) == 2:
        f["pixel_spacing"] = [float(ps[0]), float(ps[1])]
    _functional_groups(ds, f)
    _mr_declarations(ds, f)
    if ts in JPEG_DCT_SYNTAXES and "PixelData" in ds:
        tables, extra = _jpeg_tables(ds)
        if tables:
            f["jpeg_quant_tables"] = tables
        f.update({k: v for k, v in extra.items() if v is not None})
    raw: dict[str, Any] = {}
    for elem in ds:
        kw = elem.keyword
        if not kw or kw in _RAW_SKIP or elem.VR == "SQ" or elem.tag.is_private:
            continue
        try:
            raw[kw] = _text(elem.value)
        except Exception:  # noqa: BLE001
            continue
    return Header(fields=f, raw=raw)


def shared_item(ds: Any, sequence: str) -> Any:
    """First item of ``sequence`` in the shared (else the first per-frame) functional group."""
    for groups in ("SharedFunctionalGroupsSequence", "PerFrameFunctionalGroupsSequence"):
        seq = ds.get(groups)
        if seq and len(seq) and sequence in seq[0] and len(seq[0][sequence].value):
            return seq[0][sequence].value[0]
    return None


def _functional_groups(ds: Any, f: dict[str, Any]) -> None:
    """Fill pixel spacing and acquisition matrix from enhanced multi-frame macros.

    PS3.3 C.7.6.16 (Multi-frame Functional Groups): Pixel Measures macro
    (PixelSpacing) and MR FOV/Geometry macro (MRAcquisitionFrequencyEncodingSteps,
    MRAcquisitionPhaseEncodingStepsInPlane, InPlanePhaseEncodingDirection,
    PercentSampling, PercentPhaseFieldOfView).
    """
    if "pixel_spacing" not in f:
        pm = shared_item(ds, "PixelMeasuresSequence")
        ps = pm.get("PixelSpacing") if pm is not None else None
        if ps is not None and len(ps) == 2:
            f["pixel_spacing"] = [float(ps[0]), float(ps[1])]
    geo = shared_item(ds, "MRFOVGeometrySequence")
    if geo is None:
        return
    direction = str(geo.get("InPlanePhaseEncodingDirection", "") or "").strip().upper()
    if direction and "phase_encoding_direction" not in f:
        f["phase_encoding_direction"] = direction
    for key, name in (("PercentPhaseFieldOfView", "percent_phase_fov"),
                      ("PercentSampling", "percent_sampling")):
        v = float_or_none(geo.get(key))
        if v is not None and name not in f:
            f[name] = v
    freq = int_or_none(geo.get("MRAcquisitionFrequencyEncodingSteps"))
    phase = int_or_none(geo.get("MRAcquisitionPhaseEncodingStepsInPlane"))
    if "acquisition_matrix" not in f and freq and phase and direction in ("ROW", "COL"):
        f["acquisition_matrix"] = [freq, 0, 0, phase] if direction == "COL" else [0, freq,
                                                                                  phase, 0]


def _find(ds: Any, keyword: str) -> Any:
    """``keyword`` at the top level, else in the first item of any sequence of the
    shared, then the first per-frame, functional group (PS3.3 C.7.6.16)."""
    v = ds.get(keyword)
    if v not in (None, ""):
        return v
    for groups in ("SharedFunctionalGroupsSequence", "PerFrameFunctionalGroupsSequence"):
        seq = ds.get(groups)
        if not seq:
            continue
        for elem in seq[0]:
            if elem.VR != "SQ" or not elem.value:
                continue
            v = elem.value[0].get(keyword)
            if v not in (None, ""):
                return v
    return None


def _words(value: Any) -> list[str]:
    if value is None:
        return []
    vals = [value] if isinstance(value, str) else list(value)
    return [str(v).strip().upper() for v in vals if str(v).strip()]


def _mr_declarations(ds: Any, f: dict[str, Any]) -> None:
    """MR attributes that declare processing, from the MR Image Module or the Enhanced
    MR functional groups, and the Siemens CSA mosaic count.

    PS3.3 C.8.3.1 MR Image Module (ScanOptions: PFP phase / PFF frequency partial
    Fourier); C.8.13 Enhanced MR Image (MR Image Frame Type macro: FrameType;
    MR Image Description macro: ComplexImageComponent; MR Modifier macro:
    PartialFourier, PartialFourierDirection; KSpaceFiltering; MRAcquisition
    FrequencyEncodingSteps / PhaseEncodingStepsInPlane). Section numbers recalled
    from memory. The CSA header is Siemens-private; nibabel.nicom.csareader reads it.
    """
    opts = _words(ds.get("ScanOptions"))
    if opts:
        f["scan_options"] = opts
    for key, name in (("ComplexImageComponent", "complex_image_component"),
                      ("PartialFourier", "partial_fourier"),
                      ("PartialFourierDirection", "partial_fourier_direction"),
                      ("KSpaceFiltering", "kspace_filtering")):
        v = _find(ds, key)
        if v not in (None, ""):
            f[name] = str(v).strip().upper()
    ft = _find(ds, "FrameType")
    if ft is not None:
        f["frame_type"] = _words(ft)
    if "acquisition_matrix" not in f:
        freq = int_or_none(_find(ds, "MRAcquisitionFrequencyEncodingSteps"))
        phase = int_or_none(_find(ds, "MRAcquisitionPhaseEncodingStepsInPlane"))
        direction = str(_find(ds, "InPlanePhaseEncodingDirection") or "").strip().upper()
        if freq and phase and direction in ("ROW", "COL"):
            f["acquisition_matrix"] = ([freq, 0, 0, phase] if direction == "COL"
                                       else [0, freq, phase, 0])
            f.setdefault("phase_encoding_direction", direction)
    n = mosaic_count(ds)
    if n:
        f["mosaic_images"] = n


def mosaic_count(ds: Any) -> int | None:
    """Number of images in a Siemens MOSAIC (CSA image header NumberOfImagesInMosaic),
    or None when the file is not a mosaic or the count cannot be read.

    ImageType must name MOSAIC (Siemens' further ImageType value, PS3.3
    C.7.6.1.1.2 allows implementation-specific values); the count is read with
    nibabel's CSA reader.
    """
    if "MOSAIC" not in _words(ds.get("ImageType")):
        return None
    try:
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            from nibabel.nicom import csareader

            csa = csareader.get_csa_header(ds, "image")
            n = csareader.get_n_mosaic(csa) if csa else None
    except Exception:  # noqa: BLE001 - an unreadable private header is no count
        return None
    try:
        n = int(n) if n is not None else None
    except (TypeError, ValueError):
        return None
    return n if n and n > 1 else None


def read_header_only(path: str | Path) -> Header:
    """Read one DICOM file's header (and its JPEG tables) without decoding pixels.

    Parameters
    ----------
    path : str or Path

    Returns
    -------
    Header

    Raises
    ------
    InputError
        When the file is not DICOM or is damaged.
    """
    return header_fields(read_dataset(Path(path)))
