"""Materialise the simulated cases and their truth: ``python -m bench.sim2 --out DIR``."""

from __future__ import annotations

import argparse
import json
import pathlib
import sys
import time

from bench.sim2 import cases


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m bench.sim2", description=__doc__)
    ap.add_argument("--split", choices=("dev", "heldout"), default="dev")
    ap.add_argument("--quick", action="store_true", help="about a dozen small cases")
    ap.add_argument("--out", required=True, type=pathlib.Path, help="folder to write into")
    ap.add_argument("--only", default=None, help="only cases whose name contains this text")
    args = ap.parse_args(argv)
    args.out.mkdir(parents=True, exist_ok=True)
    records = []
    t_all = time.perf_counter()
    for case in cases(args.split, quick=args.quick):
        if args.only and args.only not in case.name:
            continue
        t0 = time.perf_counter()
        path, kwargs = case.materialise(args.out / case.name)
        dt = time.perf_counter() - t0
        rec = case.describe()
        rec.update({"path": str(pathlib.Path(path).relative_to(args.out)), "kwargs": kwargs,
                    "seconds": round(dt, 3)})
        records.append(rec)
        print(f"{dt:6.2f} s  {case.name}", file=sys.stderr)
    total = time.perf_counter() - t_all
    (args.out / "truth.json").write_text(json.dumps({"split": args.split, "quick": args.quick,
                                                     "seconds": round(total, 2),
                                                     "cases": records}, indent=1))
    print(f"{len(records)} cases in {total:.1f} s -> {args.out / 'truth.json'}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
