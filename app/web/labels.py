"""Short plain-English labels for trace ids, statuses and decision outcomes."""

from __future__ import annotations

from app.store.models import OUTCOMES

TRACE_LABELS: dict[str, str] = {
    "zero_filling": "Zero-filled",
    "magnitude_only": "Magnitude only",
    "coil_combination": "Coil-combined",
    "background_masking": "Masked background",
    "lossy_compression": "Lossy compression",
    "intensity_quantization": "Quantised",
    "resampling": "Resampled",
    "kspace_filtering": "k-space filtered",
    "partial_fourier": "Partial Fourier",
    "kspace_synthesis": "Computed k-space",
}

STATUS_LABELS: dict[str, str] = {
    "present": "found",
    "absent": "not found",
    "inconclusive": "unclear",
}

VERDICT_LABELS: dict[str, str] = {
    "processed": "Processed",
    "raw-like": "Raw-like",
    "inconclusive": "Inconclusive",
}


def trace_label(trace_id: str) -> str:
    """A short label for a trace id (falls back to the id in words)."""
    return TRACE_LABELS.get(trace_id, trace_id.replace("_", " ").capitalize())


def status_label(status: str) -> str:
    return STATUS_LABELS.get(status, status)


def outcome_label(outcome: str | None) -> str:
    return OUTCOMES.get(outcome or "", outcome or "")


def verdict_label(verdict: str | None) -> str:
    return VERDICT_LABELS.get(verdict or "", verdict or "")
