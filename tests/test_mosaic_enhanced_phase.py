"""Siemens MOSAIC, Enhanced MR, phase and blank inputs, from pydicom-written files.

Each test names the DICOM attributes it exercises (NEMA PS3.3; section numbers
recalled from memory where marked) and, for the MOSAIC, the real CSA header it
borrows from nibabel's test data.
"""

from __future__ import annotations

import gzip
import io
import os
import warnings
from pathlib import Path

import numpy as np
import pydicom
import pytest
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence
from pydicom.uid import ExplicitVRLittleEndian, generate_uid

from app.analysis import analyse_path
from app.io import open_input

MR_STORAGE = "1.2.840.10008.5.1.4.1.1.4"
ENHANCED_MR_STORAGE = "1.2.840.10008.5.1.4.1.1.4.1"


def _nibabel_dicom(name: str) -> Dataset:
    import nibabel as nib

    path = os.path.join(os.path.dirname(nib.__file__), "nicom", "tests", "data", name)
    raw = open(path, "rb").read()
    if name.endswith(".gz"):
        raw = gzip.decompress(raw)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pydicom.dcmread(io.BytesIO(raw), force=True)


def _base(sop_class: str, rows: int, cols: int) -> Dataset:
    ds = Dataset()
    ds.file_meta = FileMetaDataset()
    ds.file_meta.MediaStorageSOPClassUID = sop_class
    ds.file_meta.MediaStorageSOPInstanceUID = generate_uid()
    ds.file_meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = ds.file_meta.MediaStorageSOPInstanceUID
    ds.SeriesInstanceUID = generate_uid()
    ds.StudyInstanceUID = generate_uid()
    ds.Modality = "MR"
    ds.Rows, ds.Columns = rows, cols
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    ds.BitsAllocated, ds.BitsStored, ds.HighBit = 16, 12, 11
    ds.PixelRepresentation = 0
    ds.PixelSpacing = [1.0, 1.0]
    return ds


def _write(ds: Dataset, pixels: np.ndarray, path: Path) -> Path:
    ds.PixelData = np.ascontiguousarray(pixels.astype(np.uint16)).tobytes()
    ds.save_as(path, enforce_file_format=True)
    return path


def _phantom(n: int, seed: int = 0) -> np.ndarray:
    """A smooth disc with texture and Rician-like noise (synthetic, truth: raw-like)."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[:n, :n] - (n - 1) / 2
    disc = (x**2 + y**2 < (0.4 * n) ** 2) * (800 + 200 * np.cos(x / 5.0) * np.sin(y / 7.0))
    return np.abs(disc + rng.normal(0, 20, (n, n)) + 1j * rng.normal(0, 20, (n, n)))


def test_mosaic_split_into_its_slices(tmp_path):
    """ImageType ORIGINAL\\PRIMARY\\M\\ND\\MOSAIC (PS3.3 C.7.6.1.1.2 allows further values;
    MOSAIC is Siemens') with the real CSA image header (0029,1010) of nibabel's
    ``nicom/tests/data/csa_slice_norm.dcm`` (NumberOfImagesInMosaic 32, read with
    nibabel.nicom.csareader): the 384 x 384 frame is a 6 x 6 grid of 64 x 64 tiles,
    filled row by row. Truth built here: tile k holds the constant k + 1 plus a ramp;
    the reader must give 32 slices of 64 x 64 in that order."""
    src = _nibabel_dicom("csa_slice_norm.dcm")
    ds = _base(MR_STORAGE, 384, 384)
    ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "ND", "MOSAIC"]
    ds.AcquisitionMatrix = [64, 0, 0, 64]
    ds.InPlanePhaseEncodingDirection = "COL"
    for tag in (0x00291008, 0x00291009, 0x00291010, 0x00290010, 0x00290011):
        if tag in src:
            ds[tag] = src[tag]
    tiles = np.zeros((36, 64, 64))
    ramp = np.add.outer(np.arange(64), np.arange(64)) % 7
    for k in range(32):
        tiles[k] = (k + 1) * 50 + ramp
    mosaic = tiles.reshape(6, 6, 64, 64).transpose(0, 2, 1, 3).reshape(384, 384)
    path = _write(ds, mosaic, tmp_path / "mosaic.dcm")
    with open_input(str(path)) as loaded:
        vol = loaded.volumes[0]
        data = np.asarray(vol.data)
        fields = vol.header.fields
    assert data.shape == (32, 64, 64)
    np.testing.assert_array_equal(data, tiles[:32])
    assert fields["mosaic_images"] == 32
    assert (fields["rows"], fields["columns"]) == (64, 64)
    rep = analyse_path(str(path), workers=1)
    assert rep["header"]["declared"].get("mosaic") is True
    # the tiling is no longer read as an interpolated or reformatted grid
    assert not rep["header"]["declared"].get("reformatted")
    assert "zero_filling" not in {k for k, v in rep["traces"].items()
                                  if v["evidence"].get("declared")}


def _enhanced(tmp_path: Path, *, rows: int = 128, frames: int = 4) -> Path:
    """Enhanced MR Image Storage (1.2.840.10008.5.1.4.1.1.4.1) with the shared
    functional groups (PS3.3 C.7.6.16): Pixel Measures, MR FOV/Geometry
    (MRAcquisitionFrequencyEncodingSteps 64, MRAcquisitionPhaseEncodingStepsInPlane 64,
    InPlanePhaseEncodingDirection ROW), MR Modifier (PartialFourier YES,
    PartialFourierDirection PHASE; KSpaceFiltering HAMMING placed in the same item:
    the macro holding KSpaceFiltering is recalled from memory), MR Image Frame Type
    (FrameType ORIGINAL\\PRIMARY\\M\\NONE, ComplexImageComponent MAGNITUDE)."""
    ds = _base(ENHANCED_MR_STORAGE, rows, rows)
    ds.NumberOfFrames = frames
    ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "NONE"]
    pm = Dataset()
    pm.PixelSpacing = [1.0, 1.0]
    pm.SliceThickness = 2.0
    geo = Dataset()
    geo.MRAcquisitionFrequencyEncodingSteps = 64
    geo.MRAcquisitionPhaseEncodingStepsInPlane = 64
    geo.InPlanePhaseEncodingDirection = "ROW"
    geo.PercentSampling = 100
    geo.PercentPhaseFieldOfView = 100
    mod = Dataset()
    mod.PartialFourier = "YES"
    mod.PartialFourierDirection = "PHASE"
    mod.KSpaceFiltering = "HAMMING"
    ftype = Dataset()
    ftype.FrameType = ["ORIGINAL", "PRIMARY", "M", "NONE"]
    ftype.ComplexImageComponent = "MAGNITUDE"
    shared = Dataset()
    shared.PixelMeasuresSequence = Sequence([pm])
    shared.MRFOVGeometrySequence = Sequence([geo])
    shared.MRModifierSequence = Sequence([mod])
    shared.MRImageFrameTypeSequence = Sequence([ftype])
    ds.SharedFunctionalGroupsSequence = Sequence([shared])
    vol = np.stack([_phantom(rows, seed=k) for k in range(frames)])
    return _write(ds, np.clip(vol, 0, 4095), tmp_path / "enhanced.dcm")


def test_enhanced_mr_functional_groups_reach_the_traces(tmp_path):
    """The Enhanced MR functional groups named in :func:`_enhanced` are read and
    declared: 64 x 64 acquired on 128 x 128 pixels is a 2x interpolation per axis
    (PS3.3 C.8.13.5 MR FOV/Geometry macro against Rows/Columns), PartialFourier YES
    is a partial-Fourier acquisition (MR Modifier macro), KSpaceFiltering HAMMING a
    declared Hamming window, ComplexImageComponent MAGNITUDE a magnitude image."""
    path = _enhanced(tmp_path)
    rep = analyse_path(str(path), workers=1)
    decl = rep["header"]["declared"]
    assert decl["acquired"] == {"rows": 64, "cols": 64}
    assert decl["interpolation_factor"] == {"rows": 2.0, "cols": 2.0}
    assert decl["partial_fourier"] is True and decl["partial_fourier_direction"] == ["PHASE"]
    assert decl["kspace_filtering"] == "HAMMING"
    assert decl["image_kind"] == "magnitude"
    t = rep["traces"]
    for tid in ("zero_filling", "partial_fourier", "kspace_filtering", "magnitude_only"):
        ev = t[tid]["evidence"]
        assert ev["basis"] in ("declared", "declared and measured", "conflict"), tid
        assert ev["declared"]["section"].startswith("PS3.3")
        if ev["basis"] == "conflict":  # never silent: in the summary and the warnings
            assert t[tid]["summary"].startswith("Conflict")
            assert any(w.startswith(f"{tid}: header and pixels disagree")
                       for w in rep["warnings"])
    assert t["partial_fourier"]["status"] == "present"
    assert t["partial_fourier"]["origin"] == "acquisition"
    assert t["kspace_filtering"]["estimates"]["window"] in ("hamming", None) or \
        t["kspace_filtering"]["evidence"]["basis"] == "declared and measured"


def test_enhanced_mr_pydicom_data_emri_small_declares_riesz():
    """pydicom-data's ``emri_small.dcm`` (Enhanced MR, 10 frames of 64 x 64) carries
    KSpaceFiltering RIESZ, PartialFourier NO, ComplexImageComponent MAGNITUDE and
    MRAcquisitionFrequencyEncodingSteps / PhaseEncodingStepsInPlane 256 (read with
    pydicom: the file's own header). The header step must declare all four."""
    from pydicom.data import get_testdata_file

    path = get_testdata_file("emri_small.dcm")
    rep = analyse_path(path, workers=1)
    decl = rep["header"]["declared"]
    assert decl["kspace_filtering"] == "RIESZ"
    assert decl["partial_fourier"] is False
    assert decl["image_kind"] == "magnitude"
    ev = rep["traces"]["kspace_filtering"]["evidence"]
    assert ev["declared"]["value"] == {"kspace_filtering": "RIESZ"}
    assert ev["basis"] != "measured"
    assert rep["traces"]["partial_fourier"]["status"] != "present"


@pytest.mark.parametrize("stored_phase", [True, False])
def test_phase_image_is_a_phase_map(tmp_path, stored_phase):
    """ImageType ORIGINAL\\PRIMARY\\P\\ND (PS3.3 C.8.3.1.1.1: value 3 P = phase) with
    the phase stored as 0..4095 and RescaleSlope 2, RescaleIntercept -4096 (the
    physical range -4096..4094: how scanners commonly store phase, from memory).
    Truth built here: the phase of a smooth complex object. Without the P value
    (``stored_phase=False``: ImageType ...\\M\\ND, a false magnitude declaration)
    the values' -4096..4094 span still reads as a phase map, shown as a conflict."""
    n = 96
    y, x = np.mgrid[:n, :n] / n
    phase = np.angle(np.exp(1j * 2 * np.pi * (3 * x + 2 * y)))  # wraps over -pi..pi
    stored = np.round((phase + np.pi) / (2 * np.pi) * 4095).astype(np.uint16)
    ds = _base(MR_STORAGE, n, n)
    ds.ImageType = ["ORIGINAL", "PRIMARY", "P" if stored_phase else "M", "ND"]
    ds.RescaleSlope, ds.RescaleIntercept = 2, -4096
    path = _write(ds, stored, tmp_path / "phase.dcm")
    rep = analyse_path(str(path), workers=1)
    mag = rep["traces"]["magnitude_only"]
    assert mag["evidence"]["image_kind"] == "phase"
    assert mag["status"] == "present" and mag["origin"] == "processing"
    assert rep["verdict"] == "processed"
    assert "phase map" in mag["summary"]
    if stored_phase:
        assert mag["evidence"]["basis"] == "declared and measured"
    else:
        assert mag["evidence"]["basis"] == "measured"


@pytest.mark.parametrize("value", [0, 1000])
def test_blank_and_constant_inputs_have_no_signal(tmp_path, value):
    """A pydicom-written MR Image (ImageType ORIGINAL\\PRIMARY\\M\\ND, 64 x 64, 3
    files) whose every pixel holds ``value``: every contract trace is inconclusive
    with a "no signal" reason, and the report warns."""
    paths = []
    for k in range(3):
        ds = _base(MR_STORAGE, 64, 64)
        ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "ND"]
        ds.ImagePositionPatient = [0, 0, 2.0 * k]
        ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]
        ds.InstanceNumber = k + 1
        paths.append(_write(ds, np.full((64, 64), value), tmp_path / f"b{k}.dcm"))
    rep = analyse_path(str(tmp_path), workers=1)
    assert rep["verdict"] == "inconclusive"
    for tid, t in rep["traces"].items():
        assert t["status"] == "inconclusive", tid
        assert "No signal" in t["summary"], tid
    assert any("no signal" in w for w in rep["warnings"])


def test_near_constant_input_has_no_signal(tmp_path):
    """All-zero 128 x 128 MR image with 20 pixels set (0.12 % of the samples, above
    the 99.5 % single-value share): near-constant, no signal."""
    img = np.zeros((128, 128))
    img[60:64, 60:65] = 900
    ds = _base(MR_STORAGE, 128, 128)
    ds.ImageType = ["ORIGINAL", "PRIMARY", "M", "ND"]
    path = _write(ds, img, tmp_path / "near.dcm")
    rep = analyse_path(str(path), workers=1)
    assert all(t["status"] == "inconclusive" for t in rep["traces"].values())
    assert any("no signal" in w for w in rep["warnings"])


def test_real_siemens_mosaic_from_nibabel_is_split_and_blank(tmp_path):
    """nibabel's ``nicom/tests/data/siemens_dwi_1000.dcm.gz``: a Siemens diffusion
    MOSAIC (ImageType ...\\MOSAIC, 896 x 896, CSA NumberOfImagesInMosaic 48,
    AcquisitionMatrix 128 x 128, ScanOptions PFP) whose pixels nibabel ships as
    zeros (the file's own stored values, read with pydicom). Split: 48 x 128 x 128;
    blank: every trace inconclusive; ScanOptions PFP: partial Fourier declared."""
    ds = _nibabel_dicom("siemens_dwi_1000.dcm.gz")
    assert int(np.asarray(ds.pixel_array).max()) == 0  # the shipped pixels are blank
    path = tmp_path / "dwi.dcm"
    ds.save_as(path)
    rep = analyse_path(str(path), workers=1)
    assert rep["input"]["shape"] == [48, 128, 128]
    assert rep["header"]["declared"]["partial_fourier_direction"] == ["PHASE"]
    assert all(t["status"] == "inconclusive" for t in rep["traces"].values())
