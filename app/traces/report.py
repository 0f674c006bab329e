"""Run every registered analyser over a dataset and assemble the report contract.

The contract is in ``shared/REPORT_CONTRACT.md`` (schema ``rawproof.report/1``);
``app/schema/report.schema.json`` is its machine-checkable form.
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable
from typing import Any

import numpy as np

import app
from app.io.volume import Volume
from app.traces import base, calibration, plan
from app.traces.attribution import attribute
from app.traces.declared import reconcile
from app.traces.header import HeaderFacts

SCHEMA = "rawproof.report/1"
_SEVERITY = {"present": 2, "inconclusive": 1, "absent": 0}

ProgressFn = Callable[[str], None]


def analysers() -> dict[str, base.Analyser]:
    """The analysers of the plan (:data:`app.traces.plan.ANALYSERS`), in report order."""
    return plan.analysers()


def analyser_versions() -> dict[str, str]:
    """Trace id -> analyser version, stored beside each report."""
    return {tid: a.version for tid, a in analysers().items()}


def verdict_of(traces: dict[str, dict]) -> str:
    """The contract's verdict rule.

    ``processed`` when any trace is present with origin ``processing`` (the default
    when a trace carries no origin); ``raw-like`` when every trace is absent or
    present only with origin ``acquisition`` (a property of a genuine acquisition,
    such as partial Fourier delivered with its missing part as zeros); else
    ``inconclusive``.
    """
    statuses = [(t["status"], t.get("origin", "processing")) for t in traces.values()]
    if any(s == "present" and o == "processing" for s, o in statuses):
        return "processed"
    if statuses and all(s == "absent" or (s == "present" and o == "acquisition")
                        for s, o in statuses):
        return "raw-like"
    return "inconclusive"


_PLAIN = (int, str, bool, type(None))


def _jsonable(obj: Any) -> Any:
    """Turn numpy scalars/arrays and tuples into plain JSON values (NaN -> None)."""
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t in _PLAIN:
        return obj
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, list | tuple):
        # evidence holds long lists of plain numbers: those skip the recursion
        out = []
        for v in obj:
            tv = type(v)
            if tv is float:
                out.append(v if math.isfinite(v) else None)
            elif tv in _PLAIN:
                out.append(v)
            else:
                out.append(_jsonable(v))
        return out
    if isinstance(obj, np.ndarray):
        if obj.dtype.kind in "biu":
            return obj.tolist()
        if obj.dtype.kind == "f" and np.isfinite(obj).all():
            return obj.tolist()
        return _jsonable(obj.tolist())
    if isinstance(obj, np.bool_ | bool):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating | float):
        f = float(obj)
        return None if not np.isfinite(f) else f
    if isinstance(obj, np.complexfloating | complex):
        return [float(obj.real), float(obj.imag)]
    return obj


def calibrated(trace: base.Trace) -> base.Trace:
    """The trace with its confidence turned into a calibrated probability.

    Where the trace states its decision statistic (``evidence["decision"]``) and a
    calibration map was fitted for it (:mod:`app.traces.calibration`, on the
    in-sample generator and the second simulator's development split only), the
    confidence is the map's probability that the reported status is right; else it
    stays the analyser's own model-based probability. ``evidence["confidence_basis"]``
    says which. A call whose calibrated probability of being right is below one half
    becomes ``inconclusive`` with that reason (the analyser's call is kept in
    ``evidence["uncalibrated_call"]``).
    """
    dec = trace.evidence.get("decision") if isinstance(trace.evidence, dict) else None
    value = dec.get("value") if isinstance(dec, dict) else None
    basis = "analyser's own probability model"
    if value is not None and trace.status in ("present", "absent"):
        p = calibration.probability_present(trace.id, value, statistic=dec.get("statistic"))
        if p is not None:
            right = p if trace.status == "present" else 1.0 - p
            basis = "calibration map fitted on development data"
            if right < 0.5:
                # a call that the development data say is more often wrong than right is
                # not one rawproof can make honestly: it is reported as not decided
                trace.evidence["uncalibrated_call"] = {"status": trace.status,
                                                       "confidence": trace.confidence}
                trace.summary = (
                    f"Not decided: the analyser's measurement points to {trace.status}, "
                    f"but on the development data a statistic of this size went with "
                    f"{trace.status} in only {100 * right:.0f} % of cases. "
                    f"(Analyser: {trace.summary})")
                trace.status = "inconclusive"
                trace.origin = "processing"
                trace.confidence = min(right, 1.0 - right)
            else:
                trace.confidence = right
    trace.evidence["confidence_basis"] = basis
    return trace


def _input_section(volume: Volume, path: str, fmt: str, n_files: int) -> dict[str, Any]:
    return {
        "path": path,
        "format": fmt,
        "n_files": int(n_files),
        "shape": list(volume.shape),
        "dtype": str(volume.dtype),
        "domain": volume.domain,
        "value_type": volume.value_type,
    }


def analyse_volume(
    volume: Volume,
    *,
    path: str = "",
    fmt: str | None = None,
    n_files: int | None = None,
    workers: int = 2,
    max_frames: int | None = None,
    options: dict[str, Any] | None = None,
    progress: ProgressFn | None = None,
) -> dict[str, Any]:
    """Run every analyser over one Volume and return a contract report object.

    Parameters
    ----------
    volume : Volume
    path, fmt, n_files
        What the ``input`` section says; defaults from the Volume.
    workers : int
        Threads the analysers run on, and ``scipy.fft`` workers for the shared
        spectral step (1: one analyser after the other).
    max_frames : int, optional
        Analyse at most this many frames (evenly spaced); stated in ``warnings``.
    options : dict, optional
        Reader options passed on to analysers through the context.
    progress : callable, optional
        Called with one short line per analyser (the CLI prints it to stderr).

    Returns
    -------
    dict
        ``schema``, ``tool_version``, ``input``, ``verdict``, ``traces``,
        ``header``, ``warnings``, and ``timing`` (seconds per analyser).
    """
    progress_lock = threading.Lock()

    def said(tid: str) -> None:
        if progress:
            with progress_lock:
                progress(f"{volume.name or path}: {tid}")

    result = plan.execute(volume, extra_steps=["header"], workers=workers,
                          max_frames=max_frames, options=options, progress=said)
    traces_obj, seconds, steps = result.traces, result.seconds, result.steps
    facts = steps["header"]
    # 1. one observation two steps explain equally (attribution.py) is not decided; the
    #    calibration maps were fitted on the calls this rule lets through
    # 2. the pixel calls get their calibrated probabilities
    # 3. header and pixels meet in each trace (the reconciler weighs the calibrated pixel
    #    call against what the header declares); blank inputs become inconclusive
    traces_obj = attribute(traces_obj)
    traces_obj = {tid: calibrated(t) for tid, t in traces_obj.items()}
    traces_obj, joined = reconcile(traces_obj, facts, volume)
    header = ({"declared": facts.declared, "notes": facts.notes}
              if isinstance(facts, HeaderFacts) else
              {"declared": {}, "notes": [f"header could not be interpreted: {facts}"]})
    traces = {tid: _jsonable(t.to_dict()) for tid, t in traces_obj.items()}
    timing = {k: v for k, v in seconds.items()}
    warnings: list[str] = list(result.notes) + joined
    report = {
        "schema": SCHEMA,
        "tool_version": app.__version__,
        "input": _input_section(
            volume, path, fmt or volume.format, n_files or max(1, len(volume.source_files))
        ),
        "verdict": verdict_of(traces),
        "traces": traces,
        "header": _jsonable(header),
        "warnings": warnings,
        "caution": app.CAUTION,
        "analyser_versions": analyser_versions(),
        "timing": timing,
    }
    return report


def combine_groups(
    group_reports: list[dict[str, Any]], *, path: str, fmt: str, n_files: int
) -> dict[str, Any]:
    """Merge per-group reports of a folder or archive into one contract report.

    Each top-level trace is the most severe one across groups (present over
    inconclusive over absent), with the group named in its summary and evidence,
    so the verdict rule still holds; every group's full report is kept under
    ``groups``.
    """
    if len(group_reports) == 1:
        rep = dict(group_reports[0])
        rep["input"] = dict(rep["input"], path=path, format=fmt, n_files=n_files)
        return rep
    traces: dict[str, dict] = {}
    for g in group_reports:
        gname = g.get("group", "")
        for tid, t in g["traces"].items():
            best = traces.get(tid)
            if (
                best is None
                or _SEVERITY[t["status"]] > _SEVERITY[best["status"]]
                or (
                    _SEVERITY[t["status"]] == _SEVERITY[best["status"]]
                    and t["confidence"] > best["confidence"]
                )
            ):
                merged = dict(t)
                merged["summary"] = f"[{gname}] {t['summary']}" if gname else t["summary"]
                merged["evidence"] = dict(t["evidence"], group=gname)
                traces[tid] = merged
    first = max(group_reports, key=lambda g: int(np.prod(g["input"]["shape"])))
    warnings = [f"[{g.get('group', '')}] {w}" for g in group_reports for w in g["warnings"]]
    notes = [f"[{g.get('group', '')}] {n}" for g in group_reports for n in g["header"]["notes"]]
    declared = {
        g.get("group", str(i)): g["header"]["declared"] for i, g in enumerate(group_reports)
    }
    return {
        "schema": SCHEMA,
        "tool_version": app.__version__,
        "input": dict(first["input"], path=path, format=fmt, n_files=n_files),
        "verdict": verdict_of(traces),
        "traces": traces,
        "header": {"declared": declared, "notes": notes},
        "warnings": warnings,
        "caution": app.CAUTION,
        "analyser_versions": first.get("analyser_versions", {}),
        "groups": group_reports,
    }
