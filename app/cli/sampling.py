"""The ``rawproof sampling`` sub-command: effective sampling rate on the true support.

Examples::

    rawproof sampling --shape 320 320 --support 0.5 0.5 --family gaussian -R 4 --json
    rawproof sampling --from-report report.json --family all -R 8 --dims 2
    rawproof sampling --shape 256 256 --support 0.5 1 --family polynomial --curve 2 4 8 12
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

import app
from app import sampling
from app.cli.common import EXIT_BAD_INPUT, EXIT_OK, Command
from app.errors import InputError

SCHEMA = "rawproof.sampling/1"


def _add(p: argparse.ArgumentParser) -> None:
    p.add_argument("--shape", type=int, nargs=2, metavar=("ROWS", "COLS"),
                   help="image (FFT) size; taken from the report with --from-report")
    p.add_argument("--support", type=float, nargs=2, metavar=("ROWS", "COLS"),
                   help="true support fraction per axis (default 1 1, or from the report)")
    p.add_argument("--from-report", metavar="REPORT.json",
                   help="read shape and zero-filling support from a rawproof report")
    p.add_argument("--family", default="all",
                   help="mask family: " + ", ".join(sampling.FAMILIES) + " or all (default)")
    p.add_argument("-R", "--acceleration", type=float, default=4.0,
                   help="nominal acceleration (default 4)")
    p.add_argument("--dims", type=int, choices=[1, 2], default=1,
                   help="1: phase-encode lines (default), 2: single k-space samples")
    p.add_argument("--axis", choices=["rows", "cols"], default="cols",
                   help="for --dims 1, the axis the lines are chosen along (default cols)")
    p.add_argument("--n-masks", type=int, default=20, help="random masks averaged (default 20)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--param", action="append", default=[], metavar="KEY=VALUE",
                   help="family parameter: calib, decay, sigma, slope (repeatable)")
    p.add_argument("--curve", type=float, nargs="+", metavar="R",
                   help="also report effective against nominal acceleration at these R")
    p.add_argument("--json", action="store_true", help="print JSON")


def _parse_params(items: list[str]) -> dict[str, float]:
    out: dict[str, float] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key:
            raise InputError("bad_param", f"--param takes KEY=VALUE, not {item!r}")
        try:
            out[key.strip()] = float(value)
        except ValueError as exc:
            raise InputError("bad_param", f"--param {key} needs a number, not {value!r}") from exc
    return out


def support_from_report_file(path: str) -> dict[str, Any]:
    """Shape and true support per axis from a rawproof report file
    (:func:`app.sampling.support_from_report`), with the file's path.

    Raises
    ------
    InputError
        When the file cannot be read or is not a report.
    """
    try:
        with open(path, encoding="utf-8") as fh:
            report = json.load(fh)
    except (OSError, json.JSONDecodeError) as exc:
        raise InputError("unreadable", f"cannot read the report: {exc}", path) from exc
    try:
        source = sampling.support_from_report(report)
    except InputError as exc:
        raise InputError(exc.code, exc.message, path) from exc
    return {**source, "report": path}


def _run(args: Any) -> int:
    try:
        source: dict[str, Any] = {}
        if args.from_report:
            source = support_from_report_file(args.from_report)
        shape = args.shape or source.get("shape")
        if shape is None:
            raise InputError("bad_value", "give --shape ROWS COLS or --from-report REPORT.json")
        support = args.support or source.get("support") or [1.0, 1.0]
        families = sampling.FAMILIES if args.family == "all" else (args.family,)
        params = _parse_params(args.param)
        results = []
        for fam in families:
            # family parameters that do not apply to a family are left out for it
            own = params if args.family != "all" else {
                k: v for k, v in params.items() if k in sampling.default_parameters(fam)}
            results.append(sampling.effective_rate(
                shape, support, fam, args.acceleration, dims=args.dims, axis=args.axis,
                n_masks=args.n_masks, seed=args.seed, **own))
        curves = None
        if args.curve:
            curves = [sampling.curve(shape, support, r["family"], args.curve, dims=args.dims,
                                     axis=args.axis, n_masks=max(2, args.n_masks // 2),
                                     seed=args.seed, **{k: v for k, v in r["params"].items()})
                      for r in results]
    except InputError as exc:
        if args.json:
            print(json.dumps({"schema": SCHEMA, "error": exc.to_dict()}, indent=2))
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    out = {"schema": SCHEMA, "source": source or None, "shape": list(shape),
           "support": list(support), "results": results, "curves": curves,
           "caution": app.CAUTION}
    if args.json:
        print(json.dumps(out, indent=2))
        return EXIT_OK
    print(f"image {shape[0]} x {shape[1]}, true support rows {support[0]:.3f}, "
          f"cols {support[1]:.3f}, {'lines' if args.dims == 1 else '2D samples'}, "
          f"{args.n_masks} masks, seed {args.seed}")
    print(f"{'family':<12}{'nominal R':>10}{'rate':>8}{'rate in support':>18}"
          f"{'effective R':>14}")
    for r in results:
        print(f"{r['family']:<12}{r['acceleration']:>10.2f}{r['nominal_rate']:>8.3f}"
              f"{r['support_rate']:>11.3f} ± {r['support_rate_std']:.3f}"
              f"{r['effective_acceleration']:>10.2f} ± {r['effective_acceleration_std']:.2f}")
    for c in curves or []:
        pairs = ", ".join(f"R {a:g}: {e:.2f} (raw {w:.2f})" for a, e, w in
                          zip(c["acceleration"], c["effective"], c["raw_effective"], strict=True))
        print(f"curve {c['family']}: {pairs}")
    print(app.CAUTION)
    return EXIT_OK


SAMPLING = Command("sampling", "effective sampling rate of undersampling masks on the true support",
                   _add, _run)
