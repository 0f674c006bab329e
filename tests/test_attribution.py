"""The attribution rule (app/traces/attribution.py): a spectral roll-off that a
demonstrated interpolation explains as well as a window is not called a window."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from app.io.volume import Volume
from app.traces import attribution
from app.traces.base import Trace
from app.traces.report import analyse_volume
from demo_data import synth


def _kf(status="present", method=attribution.PROFILE_METHOD):
    return Trace("kspace_filtering", status, 0.9, "rolls off", {"window": None},
                 {"method": method, "decision": {"statistic": "s", "value": 2.0}})


def _rs(status):
    return Trace("resampling", status, 0.9, "periodic pattern", {}, {})


def test_profile_window_with_resampling_is_set_aside():
    out = attribution.attribute({"kspace_filtering": _kf(), "resampling": _rs("present")})
    kf = out["kspace_filtering"]
    assert kf.status == "inconclusive"
    assert "decision" not in kf.evidence  # so the calibration maps do not see it
    assert kf.evidence["set_aside_decision"]["value"] == 2.0
    assert kf.evidence["explained_by"]["trace"] == "resampling"
    assert kf.evidence["uncalibrated_call"]["status"] == "present"


def test_rule_leaves_other_calls_alone():
    for kf, rs in ((_kf(), _rs("absent")), (_kf(), _rs("inconclusive")),
                   (_kf("absent"), _rs("present")),
                   (_kf(method="background noise spectrum"), _rs("present"))):
        out = attribution.attribute({"kspace_filtering": kf, "resampling": rs})
        assert out["kspace_filtering"] is kf


def test_linear_zoom_is_not_reported_as_a_window():
    """A 1.5x linear zoom (scipy.ndimage.zoom, order 1) of root-sum-of-squares images:
    the zoom's kernel rolls the spectrum off; the report must not call a window."""
    img = synth.rss(synth.acquire((96, 96), n_coils=4, n_slices=4, sigma=0.01, seed=21),
                    axis=1)
    zoomed = np.stack([ndimage.zoom(f, 1.5, order=1) for f in img]).astype(np.float32)
    rep = analyse_volume(Volume.from_array(zoomed), workers=1)
    assert rep["traces"]["resampling"]["status"] == "present"
    kf = rep["traces"]["kspace_filtering"]
    assert kf["status"] != "present"
    # the analyser saw a roll-off; the rule set it aside (not a missed roll-off)
    assert kf["evidence"]["explained_by"]["trace"] == "resampling"
