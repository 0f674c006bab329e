"""Attribution: one observation that two processing steps explain equally well.

Some analysers measure the same physical effect. The clearest case is a spectral
roll-off: an apodization window multiplies k-space by ``w(k)``, and an image-domain
interpolation kernel (bilinear, cubic, Lanczos) multiplies the spectrum by its own
frequency response ``H(k)``, which also falls smoothly towards the band edge. Where
the ``resampling`` analyser has shown the interpolation directly (the periodic
correlation pattern that only a change of grid leaves; Popescu and Farid 2005,
Kirchner 2008), a roll-off that ``kspace_filtering`` read from the image spectrum's
profile is explained by that kernel as well as by a window, so the pixels cannot
say that a window was applied: the call becomes ``inconclusive`` with that reason.

The rule runs on the analysers' own calls, after the plan and before calibration
(``app/traces/report.py``); the set-aside decision record moves to
``evidence["set_aside_decision"]``, so that the calibration maps, fitted on the
reports' decision records (``bench/calibrate.py``), are fitted on the calls the
rule lets through, the same calls they are applied to.

References
----------
.. [1] A. C. Popescu and H. Farid, "Exposing digital forgeries by detecting traces
   of resampling", IEEE Trans. Signal Processing 53(2):758-767, 2005.
.. [2] M. Kirchner, "Fast and reliable resampling detection by spectral analysis of
   fixed linear predictor residue", Proc. ACM MM&Sec, 11-20, 2008.
.. [3] F. J. Harris, "On the use of windows for harmonic analysis with the discrete
   Fourier transform", Proc. IEEE 66(1):51-83, 1978.
"""

from __future__ import annotations

from app.traces.base import Trace

#: the ``kspace_filtering`` method whose evidence an interpolation kernel also explains
PROFILE_METHOD = "image spectrum profile (no background noise spectrum)"


def attribute(traces: dict[str, Trace]) -> dict[str, Trace]:
    """Apply the attribution rules (module docstring) to the analysers' calls.

    Parameters
    ----------
    traces : dict
        Trace id -> Trace, as :func:`app.traces.plan.execute` returns them.

    Returns
    -------
    dict
        The same mapping; a trace the rule changes is replaced by a new Trace.
    """
    out = dict(traces)
    kf, rs = traces.get("kspace_filtering"), traces.get("resampling")
    if kf is None or rs is None:
        return out
    if not (kf.status == "present" and rs.status == "present"
            and isinstance(kf.evidence, dict) and kf.evidence.get("method") == PROFILE_METHOD):
        return out
    evidence = dict(kf.evidence)
    decision = evidence.pop("decision", None)
    evidence["set_aside_decision"] = decision
    evidence["explained_by"] = {"trace": "resampling", "status": rs.status,
                                "summary": rs.summary}
    evidence["uncalibrated_call"] = {"status": kf.status, "confidence": kf.confidence}
    summary = ("Not decided: the image spectrum rolls off towards the band edge, but the "
               "grid was also resampled (see the resampling trace), and an interpolation "
               "kernel rolls the spectrum off as an apodization window does; the pixels "
               "cannot tell which. (Analyser: " + kf.summary + ")")
    out["kspace_filtering"] = Trace(kf.id, "inconclusive", 0.5, summary,
                                    {"window": None, "param": None, "shape": None},
                                    evidence, "processing")
    return out
