"""One measurement in a fresh process: seconds (imports excluded) and peak RSS.

``python -m bench._measure analyse|floor|read PATH`` prints one JSON line.
"""

from __future__ import annotations

import json
import resource
import sys
import time


def _floor(path: str) -> None:
    import scipy.fft as sfft

    from app.io import open_input

    with open_input(path) as loaded:
        for vol in loaded.volumes:
            for _, block in vol.iter_slices(16):
                sfft.fft2(block, workers=2)


def _analyse(path: str) -> dict:
    from app.analysis import analyse_path

    rep = analyse_path(path, workers=2)
    return {
        "verdict": rep["verdict"],
        "warnings": rep["warnings"],
        "present": sorted(t for t, v in rep["traces"].items() if v["status"] == "present"),
    }


def _read(path: str) -> None:
    from app.io import open_input

    with open_input(path) as loaded:
        for vol in loaded.volumes:
            vol.to_array(scaled=False)


def main() -> None:
    kind, path = sys.argv[1], sys.argv[2]
    import app.traces.report as report  # imports (and the analyser registry) outside the clock

    report.analysers()
    import nibabel  # noqa: F401  - readers import lazily; keep that outside the clock
    import pydicom  # noqa: F401
    import scipy.fft  # noqa: F401

    import app.io.dicom  # noqa: F401
    import app.io.nifti  # noqa: F401

    t0 = time.perf_counter()
    extra = {}
    if kind == "floor":
        _floor(path)
    elif kind == "analyse":
        extra = _analyse(path)
    elif kind == "read":
        _read(path)
    else:
        raise SystemExit(f"unknown measurement {kind}")
    seconds = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"seconds": seconds, "peak_rss_bytes": peak, **extra}))


if __name__ == "__main__":
    main()
