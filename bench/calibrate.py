"""Fit the calibration maps of app/traces/calibration_maps.json.

    python -m bench.calibrate [--quick] [--processes 2] [--out PATH]

Runs the analysers on the in-sample set and the second simulator's
**development** split only (never the held-out split, never the real shelf),
collects ``(evidence["decision"]["value"], truth present?)`` for every trace
whose truth is known, fits one isotonic map per trace and statistic
(app.traces.calibration.fit_map), and writes the maps with the commit, the date
and the counts. A trace without a decision statistic yet is skipped and named.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import math
import subprocess
import sys
from collections import Counter, defaultdict
from pathlib import Path
from typing import Any

from app.traces.calibration import fit_map, map_key
from bench.validate import TRACE_IDS, load_set, run_cases

CALIBRATION_SETS = ("insample", "dev")
MIN_CASES = 8  # fewer labelled values per class than this: no map (stated, not fitted)
OUT = Path(__file__).resolve().parents[1] / "app" / "traces" / "calibration_maps.json"


def collect(rows: list[dict]) -> tuple[dict[str, dict[str, list[tuple[float, bool]]]], Counter]:
    """trace -> statistic name -> [(value, truly present)] from analysed rows (pure)."""
    pairs: dict[str, dict[str, list[tuple[float, bool]]]] = defaultdict(lambda: defaultdict(list))
    without: Counter = Counter()
    for r in rows:
        rep = r.get("report")
        if rep is None:
            continue
        for tid in TRACE_IDS:
            truth = r["truth"]["traces"].get(tid, "unknown")
            tr = (rep.get("traces") or {}).get(tid)
            if truth not in ("present", "absent") or tr is None:
                continue
            dec = (tr.get("evidence") or {}).get("decision")
            if not isinstance(dec, dict) or not isinstance(dec.get("value"), (int, float)) \
                    or not math.isfinite(float(dec["value"])):
                without[tid] += 1
                continue
            pairs[tid][str(dec.get("statistic", ""))].append(
                (float(dec["value"]), truth == "present"))
    return pairs, without


def fit_all(pairs: dict[str, dict[str, list[tuple[float, bool]]]]
            ) -> tuple[dict[str, dict], list[str]]:
    """One map per trace and decision statistic (a trace measures complex data and
    magnitude images with different statistics), keyed ``"<trace>|<statistic>"``;
    messages for what was skipped."""
    maps: dict[str, dict] = {}
    notes: list[str] = []
    for tid in TRACE_IDS:
        by_stat = pairs.get(tid) or {}
        for stat, vals in sorted(by_stat.items()):
            n_pos = sum(p for _, p in vals)
            n_neg = len(vals) - n_pos
            if min(n_pos, n_neg) < MIN_CASES:
                notes.append(f"{tid}: only {n_pos} present and {n_neg} absent labelled values "
                             f"of '{stat}' (< {MIN_CASES} of each): no map, the analyser's "
                             "own probability stays")
                continue
            m = fit_map([v for v, _ in vals], [p for _, p in vals], statistic=stat)
            maps[map_key(tid, stat)] = m.to_json()
    return maps, notes


def _commit() -> str:
    try:
        return subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True,
                              text=True, cwd=OUT.parent, timeout=10).stdout.strip() or "unknown"
    except (OSError, subprocess.SubprocessError):
        return "unknown"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--processes", type=int, default=2)
    ap.add_argument("--out", type=Path, default=OUT)
    args = ap.parse_args(argv)
    rows: list[dict] = []
    used: dict[str, int] = {}
    for name in CALIBRATION_SETS:
        cases = load_set(name, quick=args.quick)
        if isinstance(cases, str):
            print(f"calibrate: set {name} skipped: {cases}")
            continue
        got = run_cases(cases, processes=args.processes, progress=sys.stderr.isatty())
        used[name] = len(got)
        rows += got
    pairs, without = collect(rows)
    maps, notes = fit_all(pairs)
    counts: dict[str, Any] = {}
    for tid in TRACE_IDS:
        vals = [v for lst in (pairs.get(tid) or {}).values() for v in lst]
        counts[tid] = {"labelled": len(vals), "present": sum(p for _, p in vals),
                       "without_statistic": without.get(tid, 0)}
        if not vals:
            notes.append(f"{tid}: no decision statistic in its evidence yet: skipped")
    out = {
        "commit": _commit(),
        "date": _dt.date.today().isoformat(),
        "fitted_on": used,
        "method": "isotonic (pool-adjacent-violators), Laplace-smoothed end blocks",
        "counts": counts,
        "notes": notes,
        "maps": maps,
    }
    args.out.write_text(json.dumps(out, indent=1) + "\n", encoding="utf-8")
    print(f"calibrate: {len(rows)} cases ({used}); maps for {sorted(maps) or 'no trace'}")
    for n in notes:
        print(f"  {n}")
    print(f"written {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
