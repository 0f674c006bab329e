"""Benchmark row of the bias probe: 8 slices of 256 x 256 at R = 4 (target < 60 s, 2 cores).

Each run is a fresh process (``python -m bench.probe_bench PATH``) that times
``app.probe.probe_path`` on a zero-filled 2x magnitude volume (bench/volumes.py),
support measurement included, imports excluded.
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

from bench import volumes

ROOT = Path(__file__).resolve().parent.parent
TARGET_S = 60.0


def bench_probe(work: Path, repeats: int, *, slices: int = 8, size: int = 256) -> dict:
    """Median wall time of the probe over ``repeats`` fresh processes."""
    path = volumes.write_nifti(volumes.magnitude_volume(size, size, slices),
                               work / f"probe_{size}x{size}x{slices}.nii")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    runs = []
    for _ in range(repeats):
        out = subprocess.run([sys.executable, "-m", "bench.probe_bench", str(path), str(slices)],
                             capture_output=True, text=True, check=True, env=env, cwd=ROOT)
        runs.append(json.loads(out.stdout.strip().splitlines()[-1]))
    seconds = statistics.median(r["seconds"] for r in runs)
    row = {"row": "probe", "shape": [slices, size, size], "acceleration": 4.0,
           "family": runs[0]["family"], "seconds": round(seconds, 2), "target_s": TARGET_S,
           "met": seconds < TARGET_S, "gap_nrmse": runs[0]["gap"]}
    print("  ".join(f"{k}={v}" for k, v in row.items()), flush=True)
    return row


def main() -> None:
    path, slices = sys.argv[1], int(sys.argv[2])
    from app import probe  # noqa: F401  - imports outside the clock
    from app.traces import plan  # noqa: F401

    t0 = time.perf_counter()
    out = probe.probe_path(path, slices=slices, acceleration=4.0, workers=2)
    print(json.dumps({"seconds": time.perf_counter() - t0, "family": out["family"],
                      "gap": round(out["gap"]["nrmse"], 4)}))


if __name__ == "__main__":
    main()
