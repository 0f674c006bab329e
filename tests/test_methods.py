"""The methods statement (app/methods.py) against hand-made reports of known content.

Each report states its truth (the traces present and their estimates); the
statement must name every present trace with its parameters, list what was not
found, and state the effective acceleration when one is given. That a
variable-density mask on zero-filled data samples the acquired support more
densely than its nominal rate is a fact of the trade (common practice, no source).
"""

from __future__ import annotations

import pytest

from app.methods import TRACE_NAMES, methods_statement


def _trace(status: str, **est: object) -> dict:
    return {"status": status, "confidence": 0.9, "summary": "s", "estimates": est,
            "evidence": {}}


def _report(traces: dict) -> dict:
    return {"schema": "rawproof.report/1", "tool_version": "0.1.0",
            "input": {"path": "x", "format": "dicom", "n_files": 12, "shape": [12, 256, 256],
                      "dtype": "uint16", "domain": "image", "value_type": "real"},
            "verdict": "processed", "traces": traces}


def test_names_every_present_trace_with_parameters() -> None:
    """Truth: zero-filled 2x along both axes (support 0.5), RSS of 8 coils, JPEG q 75."""
    rep = _report({
        "zero_filling": _trace("present", rows={"support_fraction": 0.5, "padding_factor": 2.0},
                               cols={"support_fraction": 0.5, "padding_factor": 2.0}),
        "coil_combination": _trace("present", noise_model="noncentral_chi",
                                   effective_channels=8, sigma=3.2),
        "lossy_compression": _trace("present", method="jpeg_dct", quality=75,
                                    block_origin=[0, 0]),
        "resampling": _trace("absent", rows={"factor": 1.0}, cols={"factor": 1.0}),
        "partial_fourier": _trace("inconclusive", rows=None, cols=None),
    })
    text = methods_statement(rep, None)
    for tid in ("zero_filling", "coil_combination", "lossy_compression"):
        assert TRACE_NAMES[tid] in text
    assert "50.0 % of the rows" in text and "padding factor 2" in text
    assert "about 128 of 256 samples acquired" in text
    assert "about 8 effective channels" in text and "non-central chi" in text
    assert "quality of 75" in text
    assert "No evidence of: grid resampling" in text
    assert "Not decidable from the data: partial Fourier acquisition" in text
    assert "not measured k-space" in text
    assert "\n" not in text


def test_effective_rate_and_decision_sentences() -> None:
    """Truth: nominal R = 4 with a 1D random mask lands at R_eff = 2 on a half support."""
    rep = _report({"zero_filling": _trace(
        "present", rows={"support_fraction": 1.0, "padding_factor": 1.0},
        cols={"support_fraction": 0.5, "padding_factor": 2.0})})
    text = methods_statement(
        rep, {"outcome": "downstream_only", "rationale": "interpolated magnitude images"},
        effective={"family": "random_1d", "acceleration": 4, "effective_acceleration": 2.0})
    assert "R = 4 with random 1d masks" in text and "R_eff = 2" in text
    assert "fit for downstream tasks only (interpolated magnitude images)." in text
    assert "100 % of the rows" in text


def test_raw_like_report() -> None:
    """Truth: every trace absent -> no trace found, consistent with raw data, and no
    undersampling warning."""
    rep = _report({t: _trace("absent") for t in TRACE_NAMES})
    text = methods_statement(rep, {"outcome": "fit_for_reconstruction", "rationale": ""})
    assert "No trace of processing was found." in text
    assert "consistent with raw acquisitions" in text
    assert "not measured k-space" not in text
    assert text.endswith("recorded the dataset as fit for reconstruction research.")


def _open_files() -> list[tuple[str, str]]:
    import os

    import nibabel
    from pydicom.data import get_testdata_file

    nib_data = os.path.join(os.path.dirname(nibabel.__file__), "tests", "data")
    return [
        ("pydicom JPGExtended.dcm", get_testdata_file("JPGExtended.dcm")),
        ("pydicom JPEG-lossy.dcm", get_testdata_file("JPEG-lossy.dcm")),
        ("nibabel anatomical.nii", os.path.join(nib_data, "anatomical.nii")),
    ]


@pytest.mark.slow
def test_real_open_files_statement_and_figures() -> None:
    """On open test files that packages ship (pydicom's bundled JPGExtended.dcm and
    JPEG-lossy.dcm, nibabel's tests/data/anatomical.nii), the statement names every
    trace the report found and lists every undecided one; every figure the evidence
    allows renders to a decodable, non-blank PNG (Pillow).

    Truth used: JPGExtended.dcm is stored with the JPEG Extended transfer syntax
    1.2.840.10008.1.2.4.51, a lossy process (DICOM PS3.5 section 10, read here with
    pydicom), so lossy compression must be among the traces named.
    """
    import io

    import numpy as np
    import pydicom
    from PIL import Image

    from app.analysis import analyse_path
    from app.web import figures

    for label, path in _open_files():
        report = analyse_path(path)
        text = methods_statement(report, None)
        for tid, t in report["traces"].items():
            if t["status"] == "present":
                assert TRACE_NAMES[tid] in text, (label, tid)
            if t["status"] == "inconclusive":
                assert TRACE_NAMES[tid] in text.split("Not decidable from the data:")[1], label
        for spec in figures.available(report):
            png = figures.render(spec.name, report)
            px = np.asarray(Image.open(io.BytesIO(png)).convert("L"), dtype=float)
            assert px.std() > 8, (label, spec.name)
        if label.endswith("JPGExtended.dcm"):
            ts = pydicom.dcmread(path, stop_before_pixels=True).file_meta.TransferSyntaxUID
            assert ts == "1.2.840.10008.1.2.4.51"
            assert report["traces"]["lossy_compression"]["status"] == "present"
            assert TRACE_NAMES["lossy_compression"] in text
            assert "block_signature" in [s.name for s in figures.available(report)]
