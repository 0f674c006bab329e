"""Zero-filling: the ``zero_filling`` trace from the measured k-space support.

Interpolation by zero-filling pads the acquired k-space with zeros before the
inverse FFT. The shared ``support`` step (:mod:`app.traces.support`, where the
method and its tests against the thermal noise floor are described) measures the
acquired region per axis; this analyser turns it into the contract's estimates
(support fraction and padding factor per axis), the call and its evidence.

References
----------
.. [1] Bernstein, M. A., Fain, S. B. and Riederer, S. J. "Effect of windowing and
   zero-filled reconstruction of MRI data on spatial resolution and acquisition
   strategy", J. Magn. Reson. Imaging 14(3):270-280, 2001.
"""

from __future__ import annotations

from typing import Any

from app.io.volume import Volume
from app.traces import spectrum as sp
from app.traces.base import Trace, register
from app.traces.rounding import round_record
from app.traces.support import FOUND_SUPPORT, STEP_THRESHOLD_DB, AxisSupport

TRACE_ID = "zero_filling"
DEFAULT_ESTIMATES: dict[str, Any] = {
    "rows": {"support_fraction": None, "padding_factor": None},
    "cols": {"support_fraction": None, "padding_factor": None},
}


def _confidence(decision: dict | None) -> float:
    """Probability that a present call is right: one minus the test's p-value."""
    if not decision or decision.get("p_value") is None:
        return 0.5
    return float(1.0 - decision["p_value"])


def _strongest(axes: dict[str, AxisSupport]) -> dict | None:
    """The decision record of the axis with the most evidence (smallest p-value)."""
    ds = [a.decision for a in axes.values() if a.decision]
    if not ds:
        return None
    return min(ds, key=lambda d: (d.get("p_value") if d.get("p_value") is not None else 1.0,
                                  -d["value"]))


def trace_from(spec: sp.Spectrum, axes: dict[str, AxisSupport]) -> Trace:
    """Build the ``zero_filling`` trace from a spectrum and its per-axis support."""
    estimates = {
        ax: {
            "support_fraction": round(a.support_fraction, 4),
            "padding_factor": round(a.padding_factor, 4),
        }
        for ax, a in axes.items()
    }
    found = [a for a in axes.values() if a.found and a.support_fraction < FOUND_SUPPORT]
    decision = _strongest({a.axis: a for a in found} if found else axes)
    evidence: dict[str, Any] = {
        "profiles_db": sp.profile_db_evidence(spec),
        "edges": {ax: list(a.edges) if a.edges else None for ax, a in axes.items()},
        "drop_db": {ax: sp.round_sig(a.drop_db) if a.drop_db is not None else None
                    for ax, a in axes.items()},
        "noise_floor_db": {ax: sp.round_sig(a.noise_floor_db) if a.noise_floor_db is not None
                           else None for ax, a in axes.items()},
        "step_score_db": {ax: sp.round_sig(a.score_db) for ax, a in axes.items()},
        "method": {ax: a.method for ax, a in axes.items()},
        "decisions": {ax: round_record(a.decision) for ax, a in axes.items()},
        "decision": round_record(decision),
        "threshold_db": STEP_THRESHOLD_DB,
        "n_frames": spec.n_frames,
        **sp.map_evidence(spec),
    }
    if found:
        parts = ", ".join(
            f"{a.axis} {a.padding_factor:.2f}x (support {a.support_fraction:.3f})" for a in found
        )
        how = {"noise_floor": "holds no thermal noise",
               "noise_spectrum": "holds no thermal noise (the background noise spectrum "
                                 "is that of a narrower support)"}.get(
            found[0].method, "is empty or only echo")
        summary = f"k-space {how} outside a central region: zero-filled by {parts}."
        return Trace(TRACE_ID, "present", _confidence(decision), summary, estimates, evidence)
    p = decision.get("p_value") if decision else None
    # absent: the probability of no zero-fill given the statistic; the step test has
    # no exact null for "absent", so its p-value stands in (a calibration map refines it)
    conf = float(p) if p is not None else 0.5
    summary = "The spectrum reaches the edge of k-space on every axis: no zero-filling found."
    return Trace(TRACE_ID, "absent", conf, summary, estimates, evidence)


@register(TRACE_ID, version="1", order=10, default_estimates=DEFAULT_ESTIMATES)
def analyse(volume: Volume, *, spectrum: sp.Spectrum,
            support: dict[str, AxisSupport]) -> Trace:
    """Report zero-filling interpolation from the measured k-space support.

    References
    ----------
    .. [1] Bernstein, Fain and Riederer, J. Magn. Reson. Imaging 14:270-280, 2001.
    """
    return trace_from(spectrum, support)
