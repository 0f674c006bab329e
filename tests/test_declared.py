"""The reconciler (app/traces/declared.py): header declarations joined with pixel calls."""

from __future__ import annotations

import math
import os

import numpy as np
import pytest

from app.analysis import analyse_path
from app.traces.base import Trace
from app.traces.declared import Declaration, combine, declarations, reconcile
from app.traces.header import HeaderFacts


def _logistic(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


def _logit(p: float) -> float:
    return math.log(p / (1 - p))


@pytest.mark.parametrize("measured,conf", [("present", 0.9), ("absent", 0.9), ("absent", 0.6),
                                           ("inconclusive", 0.0)])
def test_combination_is_log_odds_addition(measured, conf):
    """Two independent pieces of evidence at even prior odds add in log-odds (Bayes'
    rule; common practice, no source): P = logistic(logit 0.8 + logit P_measured),
    with P_measured = conf for present, 1 - conf for absent, 0.5 for inconclusive."""
    d = Declaration("present", 0.8, "AcquisitionMatrix [128, 0, 0, 128]", "PS3.3 C.8.3.1",
                    {"factor": {"rows": 2.0, "cols": 2.0}},
                    {"rows": {"support_fraction": 0.5, "padding_factor": 2.0}})
    t = Trace("zero_filling", measured, conf, "Pixel call.", {"rows": None}, {})
    out = combine(d, t)
    p_meas = {"present": conf, "absent": 1 - conf, "inconclusive": 0.5}[measured]
    p = _logistic(_logit(0.8) + _logit(p_meas))
    assert out.evidence["p_present"] == pytest.approx(p, abs=1e-4)
    want = "present" if p >= 0.65 else "absent" if p <= 0.35 else "inconclusive"
    assert out.status == want
    basis = {"present": "declared and measured", "absent": "conflict",
             "inconclusive": "declared"}[measured]
    assert out.evidence["basis"] == basis
    if basis == "conflict":  # the declared value is shown to the reviewer
        assert out.summary.startswith("Conflict")
        assert "AcquisitionMatrix" in out.summary
        assert out.evidence["conflict"]["declared_value"] == {"factor": {"rows": 2.0,
                                                                          "cols": 2.0}}
    if out.status == "present" and measured != "present":
        assert out.estimates["rows"]["padding_factor"] == 2.0


def test_acquisition_matrix_declares_zero_filling_per_axis():
    """AcquisitionMatrix is [frequency rows, frequency columns, phase rows, phase
    columns] (PS3.3 C.8.3.1.1, recalled from memory): [128, 0, 0, 96] with phase
    encoding COL is 96 phase steps along the rows axis and 128 frequency samples
    along the columns; on 192 x 256 pixels each axis was interpolated 2x."""
    from app.io.volume import Header, Volume
    from app.traces.header import provenance

    vol = Volume.from_array(np.zeros((192, 256)), format="dicom", header=Header(fields={
        "acquisition_matrix": [128, 0, 0, 96], "phase_encoding_direction": "COL",
        "rows": 192, "columns": 256, "image_type": ["ORIGINAL", "PRIMARY", "M", "ND"]}))
    declared, _ = provenance(vol)
    d = declarations(declared)
    assert declared["acquired"] == {"rows": 96, "cols": 128}
    assert d["zero_filling"].status == "present"
    assert d["zero_filling"].estimates["rows"]["padding_factor"] == pytest.approx(2.0)
    assert d["zero_filling"].estimates["cols"]["padding_factor"] == pytest.approx(2.0)
    assert "resampling" not in d


def test_nibabel_default_sform_code_is_no_evidence(tmp_path):
    """nibabel writes sform code 2 (NIFTI_XFORM_ALIGNED_ANAT) for an image made from
    an array and an affine (checked here against nibabel itself); nifti1.h code 4
    (NIFTI_XFORM_MNI_152) puts the grid in template space."""
    import nibabel as nib

    from app.io import open_input
    from app.traces.header import header_step

    data = np.random.default_rng(0).normal(100, 10, (16, 16, 4)).astype(np.float32)
    img = nib.Nifti1Image(data, np.eye(4))
    path = tmp_path / "script.nii"
    nib.save(img, path)
    assert int(nib.load(path).header["sform_code"]) == 2
    with open_input(str(path)) as loaded:
        facts = header_step(loaded.volumes[0])
    assert "resampling" not in declarations(facts.declared)
    assert not any("most likely been resampled" in n for n in facts.notes)
    img.set_sform(np.eye(4), code=4)
    nib.save(img, tmp_path / "mni.nii")
    with open_input(str(tmp_path / "mni.nii")) as loaded:
        facts = header_step(loaded.volumes[0])
    assert declarations(facts.declared)["resampling"].status == "present"


def test_mpr_dicom_resampling_rests_on_header_and_pixels():
    """pydicom-data's MR-SIEMENS-DICOM-WithOverlays.dcm: ImageType
    DERIVED\\SECONDARY\\MPR\\CSA MPR\\...\\M and DerivationDescription 'MEDCOM
    RESAMPLED' (the file's header, read with pydicom): a multiplanar reformat
    (PS3.3 C.7.6.1.1.2), so resampling is present, resting on the header."""
    from pydicom.data import get_testdata_file

    rep = analyse_path(get_testdata_file("MR-SIEMENS-DICOM-WithOverlays.dcm"), workers=1)
    t = rep["traces"]["resampling"]
    assert t["status"] == "present"
    assert t["evidence"]["basis"] in ("declared", "declared and measured")
    assert "MPR" in t["evidence"]["declared"]["rule"]


@pytest.mark.slow
def test_lossy_jpeg2000_is_not_read_as_2x_resampling():
    """pydicom-data's MR2_J2KI.dcm: irreversible JPEG 2000 (transfer syntax
    1.2.840.10008.1.2.4.91, LossyImageCompression 01, about 18:1 per pydicom's
    README) of the NEMA WG04 MR2 image; its uncompressed twin MR2_UNCR is not
    documented as resampled, so a 2x resampling call would be the wavelet's
    dyadic structure (ISO/IEC 15444-1), not a grid scaling."""
    from pydicom.data import get_testdata_file

    rep = analyse_path(get_testdata_file("MR2_J2KI.dcm"), workers=1)
    t = rep["traces"]["resampling"]
    assert t["status"] != "present"
    assert t["evidence"]["dyadic_excluded"] is True
    assert rep["traces"]["lossy_compression"]["status"] == "present"


def test_spm_descrip_declares_resampling():
    """nibabel's tests/data/resampled_anat_moved.nii: descrip 'spm - realigned',
    resliced by SPM with trilinear interpolation (nibabel's resample_using_spm.m,
    per the shelf's provenance). The declaration reaches the resampling trace,
    and any disagreement with the pixels is shown as a conflict."""
    import nibabel as nib

    path = os.path.join(os.path.dirname(nib.__file__), "tests", "data",
                        "resampled_anat_moved.nii")
    rep = analyse_path(path, workers=1)
    t = rep["traces"]["resampling"]
    assert t["evidence"]["declared"]["rule"].startswith("NIfTI descrip")
    assert t["evidence"]["basis"] in ("declared", "declared and measured", "conflict")
    if t["evidence"]["basis"] == "conflict":
        assert t["summary"].startswith("Conflict")
        assert any(w.startswith("resampling: header and pixels disagree")
                   for w in rep["warnings"])


def test_traces_without_declarations_are_measured():
    """With no header facts at all, every trace keeps its pixel call and says
    ``basis: measured`` (the reconciler's definition)."""
    t = Trace("coil_combination", "absent", 0.7, "Pixel call.", {}, {})
    out, warnings = reconcile({"coil_combination": t}, HeaderFacts({}, []), None)
    assert out["coil_combination"].status == "absent"
    assert out["coil_combination"].evidence["basis"] == "measured"
    assert warnings == []


def test_calibrated_pixel_call_enters_as_a_likelihood_ratio():
    """A calibrated pixel probability already holds the base rate of the data its map
    was fitted on; combining it with a declaration divides that rate out (naive Bayes:
    posterior log-odds = declaration log-odds + pixel log-odds - base-rate log-odds).
    Built truth: a map whose base rate is 0.2 and a pixel call at exactly that rate
    carries no evidence, so the result is the declaration's own strength."""
    import math

    from app.traces import calibration, declared
    from app.traces.base import Trace

    cmap = calibration.fit_map([0.0] * 80 + [1.0] * 20, [False] * 80 + [True] * 20,
                               statistic="s")
    base = (cmap.n_present + 1) / (cmap.n + 2)
    dec = declared.Declaration("present", 0.8, "a rule", "PS3.3 test")
    pixel = Trace("resampling", "absent", 1.0 - base, "pixels", {"rows": {"factor": 1.0},
                  "cols": {"factor": 1.0}},
                  {"decision": {"statistic": "s", "value": 0.5},
                   "confidence_basis": "calibration map fitted on development data"})
    import unittest.mock as mock

    with mock.patch.object(calibration, "load_maps",
                           lambda: {calibration.map_key("resampling", "s"): cmap}):
        out = declared.combine(dec, pixel)
    assert math.isclose(out.evidence["p_present"], 0.8, abs_tol=1e-3)
