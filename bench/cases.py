"""What a validation case is: its truth record and how it is built.

Shared by the set modules (bench/insample.py, bench/shelf.py) and the runner
(bench/validate.py), which import it from here so that none of them imports the
other.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

TRACE_IDS = (
    "zero_filling", "magnitude_only", "coil_combination", "background_masking",
    "lossy_compression", "intensity_quantization", "resampling", "kspace_filtering",
    "partial_fourier", "kspace_synthesis",
)


@dataclass
class Case:
    """One candidate dataset and the truth it was built with (or documented to have).

    ``truth`` = ``{"verdict": "raw-like"|"processed"|"unknown", "traces": {id:
    "present"|"absent"|"unknown"}, "origin": {id: "acquisition"}, "params":
    {"<trace>.<estimate path>": value}}``. ``build(folder)`` writes the files (or
    points at installed ones) and returns ``(path, kwargs for analyse_path)``.
    """

    name: str
    split: str
    route: str
    truth: dict
    build: Callable[[Path], tuple[str, dict]] | None = field(default=None, repr=False)
    note: str = ""

    def materialise(self, folder: Path) -> tuple[str, dict]:
        """Write the case's files under ``folder``; return the path and analyse kwargs."""
        if self.build is None:
            raise NotImplementedError(f"case {self.name} has no builder")
        return self.build(Path(folder))


def make_truth(traces: dict[str, str], *, params: dict | None = None,
               origin: dict[str, str] | None = None, verdict: str | None = None) -> dict:
    """A truth record with every contract trace id (missing ones ``unknown``).

    The verdict follows the contract's rule unless given: ``processed`` when any
    trace is present with origin processing, ``raw-like`` when every trace is
    absent or present only with origin acquisition, else ``unknown``.
    """
    origin = dict(origin or {})
    full = {tid: traces.get(tid, "unknown") for tid in TRACE_IDS}
    unknown = set(traces) - set(TRACE_IDS)
    if unknown:
        raise ValueError(f"unknown trace ids {sorted(unknown)}")
    if verdict is None:
        present = [t for t, s in full.items() if s == "present"]
        if any(origin.get(t, "processing") == "processing" for t in present):
            verdict = "processed"
        elif all(s == "absent" or (s == "present" and origin.get(t) == "acquisition")
                 for t, s in full.items()):
            verdict = "raw-like"
        else:
            verdict = "unknown"
    return {"verdict": verdict, "traces": full, "origin": origin, "params": dict(params or {})}
