"""Header provenance asserted against headers of openly shipped test files.

Sources: pydicom's bundled files (MR_small.dcm, JPGExtended.dcm,
JPEGLSNearLossless_16.dcm) and pydicom-data (emri_small.dcm, MR2_J2KI.dcm,
MR-SIEMENS-DICOM-WithOverlays.dcm); nibabel's tests/data (anatomical.nii,
example4d.nii.gz); NEMA PS3.3 C.8.3.1.1 (AcquisitionMatrix is
[frequency rows, frequency columns, phase rows, phase columns]); NIfTI-1
``nifti1.h`` xform codes; Pillow's libjpeg encoder for JPEG tables.
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from PIL import Image
from pydicom.data import get_testdata_file

from app.io import open_input
from app.io.volume import Header, Volume
from app.traces.header import provenance

NIB = Path(nib.__file__).parent / "tests" / "data"


def _declared(path) -> tuple[dict, list[str]]:
    with open_input(path) as loaded:
        return provenance(loaded.volumes[0])


def test_siemens_mpr_derived_secondary_and_interpolated():
    """MR-SIEMENS-DICOM-WithOverlays.dcm declares DERIVED\\SECONDARY\\MPR, AcquisitionMatrix
    [256, 0, 0, 134], phase encoding COL, PercentPhaseFieldOfView 75 and 484 x 484
    pixels of 0.723 mm. Truth from those fields: 256 frequency samples along the
    columns axis (factor 484 / 256 = 1.8906) and 134 phase lines over 75 % of the
    field of view along the rows axis (factor 0.75 * 484 / 134 = 2.709)."""
    d, notes = _declared(get_testdata_file("MR-SIEMENS-DICOM-WithOverlays.dcm"))
    assert d["derived"] is True and d["secondary"] is True and d["reformatted"] is True
    assert d["acquisition_matrix"] == [256, 0, 0, 134]
    assert d["acquired"] == {"rows": 134, "cols": 256}
    assert d["interpolation_factor"]["cols"] == pytest.approx(484 / 256, abs=1e-3)
    assert d["interpolation_factor"]["rows"] == pytest.approx(0.75 * 484 / 134, abs=1e-3)
    assert d["percent_sampling"] == pytest.approx(69.79166667)
    assert d["lossy_compression"] is None
    assert any("interpolated" in n for n in notes)
    assert d["derivation_description"] == "MEDCOM RESAMPLED"


def test_jpeg2000_declared_lossy():
    """MR2_J2KI.dcm: LossyImageCompression 01, ratio 18, JPEG 2000 transfer syntax .91."""
    d, notes = _declared(get_testdata_file("MR2_J2KI.dcm"))
    assert d["lossy_compression"] is True and d["lossy_ratio"] == 18.0
    assert d["transfer_syntax"] == "1.2.840.10008.1.2.4.91"
    assert d["lossy_method"] == "ISO_15444_1"
    assert d["derived"] is True and d["primary"] is True


def test_jpeg_extended_declared_with_table_quality():
    """JPGExtended.dcm: lossy 76:1, transfer syntax .51, stored table nearest IJG quality 42
    (each entry is Annex K.1 x 1.19 rounded: 16 -> 19, 99 -> 118)."""
    d, _ = _declared(get_testdata_file("JPGExtended.dcm"))
    assert d["lossy_compression"] is True and d["lossy_ratio"] == 76.0
    assert d["transfer_syntax"] == "1.2.840.10008.1.2.4.51"
    assert d["lossy_method"] == "ISO_10918_1"
    assert d["stored_jpeg_quality"] == 42
    assert np.asarray(d["stored_jpeg_table"]).shape == (8, 8)
    assert d["stored_jpeg_table"][0][0] == 19 and d["stored_jpeg_table"][7][7] == 118


def test_near_lossless_transfer_syntax_is_lossy():
    """JPEGLSNearLossless_16.dcm: transfer syntax .81 (JPEG-LS near-lossless) is lossy."""
    d, _ = _declared(get_testdata_file("JPEGLSNearLossless_16.dcm"))
    assert d["lossy_compression"] is True
    assert d["transfer_syntax"] == "1.2.840.10008.1.2.4.81"


def test_original_primary_and_declared_not_lossy():
    """emri_small.dcm: ORIGINAL\\PRIMARY, LossyImageCompression 00, uncompressed."""
    d, _ = _declared(get_testdata_file("emri_small.dcm"))
    assert d["original"] is True and d["primary"] is True and d["derived"] is False
    assert d["lossy_compression"] is False


def test_mr_small_derived_no_lossy_attribute():
    """MR_small.dcm: DERIVED\\SECONDARY\\OTHER and no LossyImageCompression: unknown (None)."""
    d, _ = _declared(get_testdata_file("MR_small.dcm"))
    assert d["derived"] is True and d["secondary"] is True
    assert d["lossy_compression"] is None
    assert d["bits_stored"] == 16 and d["bits_used"] == 11  # values 127..2145


def test_bits_used_against_bits_stored():
    """Synthetic header: BitsStored 12 with stored values 0..255 (truth: 8 bits used)."""
    vol = Volume.from_array(np.zeros((4, 4)), format="dicom", header=Header(fields={
        "bits_stored": 12, "pixel_representation": 0, "stored_value_range": [0, 255]}))
    d, notes = provenance(vol)
    assert d["bits_used"] == 8 and any("8-bit" in n for n in notes)
    vol.header.fields["stored_value_range"] = [0, 5000]
    d, notes = provenance(vol)
    assert any("exceed" in n for n in notes)


def test_acquisition_matrix_row_direction():
    """Synthetic header: AcquisitionMatrix [0, 256, 128, 0] with phase encoding ROW on
    256 x 256 pixels: 256 frequency samples vertically, 128 phase lines horizontally
    (truth: factors rows 1.0, cols 2.0)."""
    vol = Volume.from_array(np.zeros((4, 4)), format="dicom", header=Header(fields={
        "acquisition_matrix": [0, 256, 128, 0], "rows": 256, "columns": 256,
        "phase_encoding_direction": "ROW"}))
    d, _ = provenance(vol)
    assert d["acquired"] == {"rows": 256, "cols": 128}
    assert d["interpolation_factor"] == {"rows": 1.0, "cols": 2.0}


def test_nifti_aligned_and_template_codes(tmp_path):
    """anatomical.nii has sform_code 2 (aligned to another image) and descrip
    'spm - 3D normalized'; a file written with sform_code 4 is in MNI template space;
    example4d.nii.gz (codes 1) is in scanner space."""
    d, notes = _declared(NIB / "anatomical.nii")
    assert d["sform_code"] == 2 and d["grid_aligned_to"] == "image"
    assert d["descrip"] == "spm - 3D normalized"
    img = nib.Nifti1Image(np.zeros((4, 4, 2), np.float32), np.eye(4))
    img.set_sform(np.eye(4), code=4)
    nib.save(img, tmp_path / "mni.nii")
    d, notes = _declared(tmp_path / "mni.nii")
    assert d["grid_aligned_to"] == "template" and d["template_space"] == "mni"
    assert any("template" in n for n in notes)
    d, _ = _declared(NIB / "example4d.nii.gz")
    assert d["grid_aligned_to"] == "scanner" and d["lossy_compression"] is None


def test_png_declares_nothing_lossy(tmp_path):
    """A PNG (lossless format) says nothing about earlier lossy steps: None, no table."""
    Image.fromarray(np.zeros((8, 8), np.uint8)).save(tmp_path / "a.png")
    d, _ = _declared(tmp_path / "a.png")
    assert d["lossy_compression"] is None and "stored_jpeg_quality" not in d
    assert d["bit_depth"] == 8
