"""The Trace type and the one place analysers register themselves."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

STATUSES = ("present", "absent", "inconclusive")
ORIGINS = ("processing", "acquisition")


class StepUnavailableError(Exception):
    """A shared step cannot be computed for this input (too small, no pixels, ...).

    ``reason`` is one sentence a reviewer can read; the analysers that need the
    step come out ``inconclusive`` with it.
    """

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason


@dataclass
class Trace:
    """One analyser's finding, shaped as the report contract's ``<trace>``.

    Attributes
    ----------
    id : str
        The trace id (``zero_filling``, ``lossy_compression``, ...).
    status : {"present", "absent", "inconclusive"}
    confidence : float
        0 to 1.
    summary : str
        One sentence a reviewer can read.
    estimates : dict
        The contract's required keys for this trace id, plus any extra.
    evidence : dict
        Numbers and short arrays (lists) behind the call, for the page to plot.
    origin : {"processing", "acquisition"}
        ``acquisition`` for a property of a genuine acquisition (partial Fourier
        delivered with zeros, a kept oversampled readout) rather than a step applied
        to the measured data; only ``processing`` findings make a dataset
        ``processed``.
    """

    id: str
    status: str
    confidence: float
    summary: str
    estimates: dict[str, Any] = field(default_factory=dict)
    evidence: dict[str, Any] = field(default_factory=dict)
    origin: str = "processing"

    def __post_init__(self) -> None:
        if self.status not in STATUSES:
            raise ValueError(f"status must be one of {STATUSES}, not {self.status!r}")
        if self.origin not in ORIGINS:
            raise ValueError(f"origin must be one of {ORIGINS}, not {self.origin!r}")
        self.confidence = float(min(1.0, max(0.0, self.confidence)))

    def to_dict(self) -> dict[str, Any]:
        return {
            "status": self.status,
            "confidence": round(self.confidence, 4),
            "summary": self.summary,
            "estimates": self.estimates,
            "evidence": self.evidence,
            "origin": self.origin,
        }


@dataclass(frozen=True)
class Analyser:
    """A registered analyser: ``func(volume, context) -> Trace``."""

    trace_id: str
    func: Callable[..., Trace]
    version: str
    order: int
    default_estimates: dict[str, Any]


_REGISTRY: dict[str, Analyser] = {}


def register(
    trace_id: str,
    *,
    version: str = "1",
    order: int = 100,
    default_estimates: dict[str, Any] | None = None,
) -> Callable[[Callable[..., Trace]], Callable[..., Trace]]:
    """Register an analyser function under a trace id.

    The function takes ``(volume, context)`` and returns a :class:`Trace`. It must
    not print or touch files. Its module must be listed in
    :data:`app.traces.plan.ANALYSERS`; its keyword-only parameters name the
    shared steps it takes (see :mod:`app.traces.plan`).

    Parameters
    ----------
    trace_id : str
        The contract's trace id.
    version : str
        Bumped whenever the analyser's numbers may change; stored with reports.
    order : int
        Position in reports (lower first).
    default_estimates : dict, optional
        The contract's required estimate keys with null-ish values, used when the
        analyser fails so that a failing trace is still contract-shaped.
    """

    def deco(func: Callable[..., Trace]) -> Callable[..., Trace]:
        _REGISTRY[trace_id] = Analyser(
            trace_id, func, version, order, dict(default_estimates or {})
        )
        return func

    return deco


def registered() -> dict[str, Analyser]:
    """The analysers registered so far, by trace id, in report order."""
    return dict(sorted(_REGISTRY.items(), key=lambda kv: (kv[1].order, kv[0])))


def inconclusive(trace_id: str, reason: str, **evidence: Any) -> Trace:
    """A contract-shaped inconclusive trace with the reason as its summary."""
    defaults = _REGISTRY[trace_id].default_estimates if trace_id in _REGISTRY else {}
    return Trace(
        id=trace_id,
        status="inconclusive",
        confidence=0.0,
        summary=reason,
        estimates=dict(defaults),
        evidence={"reason": reason, **evidence},
    )
