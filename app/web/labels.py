"""Labels for trace ids, statuses, verdicts and decision outcomes on the pages.

Every name comes from :mod:`app.methods` (the one source the command line, the
exports and the methods statement also read); this module only adds the
verdict words and the lookups the templates call.
"""

from __future__ import annotations

from app.methods import OUTCOME_LABELS, STATUS_WORDS, TRACE_LABELS, status_word, trace_label

__all__ = ["OUTCOME_LABELS", "STATUS_LABELS", "TRACE_LABELS", "VERDICT_LABELS",
           "outcome_label", "status_label", "trace_label", "verdict_label"]

STATUS_LABELS: dict[str, str] = STATUS_WORDS

VERDICT_LABELS: dict[str, str] = {
    "processed": "Processed",
    "raw-like": "Raw-like",
    "inconclusive": "Inconclusive",
}


def status_label(status: str) -> str:
    """The status word (present, absent, inconclusive)."""
    return status_word(status)


def outcome_label(outcome: str | None) -> str:
    return OUTCOME_LABELS.get(outcome or "", outcome or "")


def verdict_label(verdict: str | None) -> str:
    return VERDICT_LABELS.get(verdict or "", verdict or "")
