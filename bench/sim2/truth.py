"""Truth records for simulated cases, following the report contract's trace ids and verdict rule."""

from __future__ import annotations

from typing import Any

TRACE_IDS = ("zero_filling", "magnitude_only", "coil_combination", "background_masking",
             "lossy_compression", "intensity_quantization", "resampling", "kspace_filtering",
             "partial_fourier", "kspace_synthesis")


def verdict(traces: dict[str, str], origin: dict[str, str]) -> str:
    """The contract's rule: processed if any trace is present with origin processing;
    raw-like if every trace is absent or present with origin acquisition; else unknown."""
    if any(s == "present" and origin.get(t) != "acquisition" for t, s in traces.items()):
        return "processed"
    if all(s == "absent" or (s == "present" and origin.get(t) == "acquisition")
           for t, s in traces.items()):
        return "raw-like"
    return "unknown"


def make_truth(status: dict[str, str] | None = None, *, origin: dict[str, str] | None = None,
               params: dict[str, Any] | None = None) -> dict[str, Any]:
    """A full truth dict: every trace id, absent unless ``status`` says otherwise."""
    traces = {t: "absent" for t in TRACE_IDS}
    for key, value in (status or {}).items():
        if key not in traces:
            raise KeyError(f"unknown trace id {key!r}")
        if value not in ("present", "absent", "unknown"):
            raise ValueError(f"bad status {value!r} for {key}")
        traces[key] = value
    origin = dict(origin or {})
    return {"verdict": verdict(traces, origin), "traces": traces, "origin": origin,
            "params": dict(params or {})}
