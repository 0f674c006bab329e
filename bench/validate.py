"""Validate the analysers on sets they were not tuned on, and print the tables.

    python -m bench.validate [--quick] [--sets heldout,shelf,insample,dev] [--json OUT]

Sets (printed in this order): ``heldout`` (bench/sim2, held-out split), ``shelf``
(real MRI files shipped inside installed packages, bench/shelf.py), ``insample``
(the in-sample generator, bench/insample.py) and, only when asked, ``dev``
(bench/sim2, development split). Thresholds, models and calibration maps are
fitted on ``insample`` and ``dev`` only; ``heldout`` and ``shelf`` only report.

Each case is written to a temporary folder and analysed with
``app.analysis.analyse_path(path, workers=1, **kwargs)`` in a pool of two
processes, one case per task, with a per-case time limit; a failing case is
counted, never fatal.

The scoring functions (:func:`score_set` and the helpers it calls) are pure:
reports and truths in, tables out.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import math
import multiprocessing
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from bench.cases import TRACE_IDS, Case, make_truth  # noqa: F401 - re-exported for scripts

SET_ORDER = ("heldout", "shelf", "insample", "dev")
CASE_TIMEOUT_S = 120
N_BINS = 10


# --------------------------------------------------------------------------- scoring (pure)

def wilson_interval(k: int, n: int, z: float = 1.959964) -> tuple[float, float]:
    """95 % Wilson score interval for a binomial proportion ``k / n``.

    References
    ----------
    E. B. Wilson, "Probable inference, the law of succession, and statistical
    inference", J. Am. Stat. Assoc. 22 (1927) 209-212.
    """
    if n <= 0:
        return (float("nan"), float("nan"))
    p = k / n
    den = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / den
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    return (max(0.0, centre - half), min(1.0, centre + half))


def _status(report: dict | None, tid: str) -> str:
    if report is None:
        return "error"
    tr = (report.get("traces") or {}).get(tid)
    if tr is None:
        return "not run"
    return str(tr.get("status"))


def verdict_table(rows: Sequence[dict]) -> dict:
    """Verdict accuracy over the cases with a known verdict.

    ``rows`` are ``{"truth": ..., "report": ... or None}``. A case whose analysis
    failed counts in ``errors`` and not in the accuracy.
    """
    out = {"known": 0, "right": 0, "processed_as_raw": 0, "raw_as_processed": 0,
           "inconclusive": 0, "errors": 0, "n_processed": 0, "n_raw": 0}
    for r in rows:
        tv = r["truth"]["verdict"]
        if r.get("report") is None:
            out["errors"] += 1
            continue
        if tv not in ("raw-like", "processed"):
            continue
        rv = r["report"].get("verdict")
        out["known"] += 1
        out["n_processed"] += tv == "processed"
        out["n_raw"] += tv == "raw-like"
        out["right"] += rv == tv
        out["inconclusive"] += rv == "inconclusive"
        out["processed_as_raw"] += tv == "processed" and rv == "raw-like"
        out["raw_as_processed"] += tv == "raw-like" and rv == "processed"
    out["accuracy"] = out["right"] / out["known"] if out["known"] else float("nan")
    return out


def trace_table(rows: Sequence[dict], trace_ids: Iterable[str] = TRACE_IDS) -> dict[str, dict]:
    """Per trace TP/FN/FP/TN, inconclusive calls, not-run count and Wilson intervals.

    Truth ``unknown`` is excluded. An inconclusive call on a positive (negative)
    counts in ``inc_pos`` (``inc_neg``), never as TP or TN; it stays in the
    denominators: TP rate = TP / (TP + FN + inc_pos), FP rate = FP / (FP + TN + inc_neg).
    A trace absent from a report counts as ``not_run`` and is left out of the rates.
    """
    out: dict[str, dict] = {}
    for tid in trace_ids:
        c = {"tp": 0, "fn": 0, "fp": 0, "tn": 0, "inc_pos": 0, "inc_neg": 0, "not_run": 0,
             "errors": 0}
        for r in rows:
            truth = r["truth"]["traces"].get(tid, "unknown")
            if truth not in ("present", "absent"):
                continue
            s = _status(r.get("report"), tid)
            if s == "error":
                c["errors"] += 1
            elif s == "not run":
                c["not_run"] += 1
            elif truth == "present":
                c[{"present": "tp", "absent": "fn"}.get(s, "inc_pos")] += 1
            else:
                c[{"present": "fp", "absent": "tn"}.get(s, "inc_neg")] += 1
        pos = c["tp"] + c["fn"] + c["inc_pos"]
        neg = c["fp"] + c["tn"] + c["inc_neg"]
        c["tpr"] = c["tp"] / pos if pos else float("nan")
        c["tpr_ci"] = wilson_interval(c["tp"], pos)
        c["fpr"] = c["fp"] / neg if neg else float("nan")
        c["fpr_ci"] = wilson_interval(c["fp"], neg)
        out[tid] = c
    return out


def _dig(obj: Any, path: Sequence[str]) -> Any:
    for key in path:
        if not isinstance(obj, dict) or key not in obj:
            return None
        obj = obj[key]
    return obj


def param_table(rows: Sequence[dict]) -> dict[str, dict]:
    """Parameter errors on cases where the trace is truly present and called present.

    Numeric truths: relative error ``|est - true| / |true|`` (a missing estimate
    is counted in ``missing``); categorical truths: share equal.
    """
    acc: dict[str, dict] = {}
    for r in rows:
        rep = r.get("report")
        if rep is None:
            continue
        for dotted, true in (r["truth"].get("params") or {}).items():
            if true is None:  # a parameter the truth leaves open is not scored
                continue
            tid, *path = dotted.split(".")
            tr = (rep.get("traces") or {}).get(tid)
            if tr is None or tr.get("status") != "present":
                continue
            if r["truth"]["traces"].get(tid) != "present":
                continue
            est = _dig(tr.get("estimates") or {}, path)
            a = acc.setdefault(dotted, {"kind": "numeric" if isinstance(true, (int, float))
                                        and not isinstance(true, bool) else "categorical",
                                        "errors": [], "right": 0, "n": 0, "missing": 0})
            a["n"] += 1
            if a["kind"] == "numeric":
                if isinstance(est, (int, float)) and not isinstance(est, bool) and true != 0:
                    a["errors"].append(abs(float(est) - float(true)) / abs(float(true)))
                else:
                    a["missing"] += 1
            else:
                a["right"] += est == true
    out = {}
    for dotted, a in sorted(acc.items()):
        if a["kind"] == "numeric":
            e = sorted(a["errors"])
            out[dotted] = {"kind": "numeric", "n": a["n"], "missing": a["missing"],
                           "median": _quantile(e, 0.5), "p95": _quantile(e, 0.95)}
        else:
            out[dotted] = {"kind": "categorical", "n": a["n"], "right": a["right"],
                           "share": a["right"] / a["n"] if a["n"] else float("nan")}
    return out


def _quantile(sorted_values: Sequence[float], q: float) -> float:
    """Linear-interpolation quantile (numpy's default, 'type 7' of Hyndman and Fan 1996)."""
    n = len(sorted_values)
    if n == 0:
        return float("nan")
    h = (n - 1) * q
    lo = math.floor(h)
    hi = min(lo + 1, n - 1)
    return float(sorted_values[lo] + (h - lo) * (sorted_values[hi] - sorted_values[lo]))


def definite_calls(rows: Sequence[dict], trace_ids: Iterable[str] = TRACE_IDS
                   ) -> list[tuple[str, float, bool]]:
    """(trace id, confidence, status right) for every present/absent call with known truth."""
    out = []
    for r in rows:
        rep = r.get("report")
        if rep is None:
            continue
        for tid in trace_ids:
            truth = r["truth"]["traces"].get(tid, "unknown")
            tr = (rep.get("traces") or {}).get(tid)
            if truth not in ("present", "absent") or tr is None:
                continue
            if tr.get("status") not in ("present", "absent"):
                continue
            out.append((tid, float(tr.get("confidence", float("nan"))), tr["status"] == truth))
    return out


def reliability(calls: Sequence[tuple[str, float, bool]], n_bins: int = N_BINS) -> dict:
    """Reliability table and expected calibration error of the stated confidences.

    Equal-width bins on [0, 1]; ECE = sum_b (n_b / N) |acc_b - conf_b|.

    References
    ----------
    M. P. Naeini, G. F. Cooper, M. Hauskrecht, "Obtaining well calibrated
    probabilities using Bayesian binning", AAAI 2015; C. Guo, G. Pleiss, Y. Sun,
    K. Q. Weinberger, "On calibration of modern neural networks", ICML 2017.
    """
    bins = [{"lo": i / n_bins, "hi": (i + 1) / n_bins, "n": 0, "conf_sum": 0.0, "right": 0}
            for i in range(n_bins)]
    n = 0
    for _, conf, right in calls:
        if not math.isfinite(conf):
            continue
        b = bins[min(int(conf * n_bins), n_bins - 1) if conf > 0 else 0]
        b["n"] += 1
        b["conf_sum"] += conf
        b["right"] += bool(right)
        n += 1
    ece = 0.0
    for b in bins:
        b["mean_conf"] = b["conf_sum"] / b["n"] if b["n"] else float("nan")
        b["observed"] = b["right"] / b["n"] if b["n"] else float("nan")
        if b["n"]:
            ece += b["n"] / n * abs(b["observed"] - b["mean_conf"])
    return {"bins": bins, "n": n, "ece": ece if n else float("nan")}


def constant_confidence(rows: Sequence[dict], trace_ids: Iterable[str] = TRACE_IDS
                        ) -> dict[str, dict]:
    """For each trace: how many calls, how many distinct confidence values (rounded to 1e-6)."""
    out = {}
    for tid in trace_ids:
        vals = []
        for r in rows:
            tr = ((r.get("report") or {}).get("traces") or {}).get(tid)
            if tr is not None and tr.get("confidence") is not None:
                vals.append(round(float(tr["confidence"]), 6))
        out[tid] = {"n": len(vals), "distinct": len(set(vals)),
                    "constant": len(vals) > 1 and len(set(vals)) == 1,
                    "values": sorted(set(vals))[:5]}
    return out


def score_set(rows: Sequence[dict]) -> dict:
    """All tables of one set from ``[{"name", "truth", "report" | None, "error"}]``."""
    calls = definite_calls(rows)
    per_trace_ece = {tid: reliability([c for c in calls if c[0] == tid])["ece"]
                     for tid in TRACE_IDS}
    return {
        "n_cases": len(rows),
        "errors": [(r["name"], r.get("error")) for r in rows if r.get("report") is None],
        "verdict": verdict_table(rows),
        "traces": trace_table(rows),
        "params": param_table(rows),
        "reliability": reliability(calls),
        "ece_per_trace": per_trace_ece,
        "constant": constant_confidence(rows),
    }


# --------------------------------------------------------------------------- formatting

def _pct(x: float) -> str:
    return "  n/a" if not math.isfinite(x) else f"{100 * x:5.1f}"


def _ci(ci: tuple[float, float]) -> str:
    lo, hi = ci
    return "     n/a     " if not math.isfinite(lo) else f"[{100 * lo:4.1f}, {100 * hi:5.1f}]"


def format_set(name: str, s: dict) -> str:
    """The printed tables of one set."""
    v = s["verdict"]
    lines = [f"== {name}: {s['n_cases']} cases, {len(s['errors'])} failed to analyse =="]
    lines.append(
        f"verdict right {v['right']}/{v['known']} ({_pct(v['accuracy']).strip()} %) of cases "
        f"with a known verdict ({v['n_processed']} processed, {v['n_raw']} raw-like); "
        f"reported inconclusive {v['inconclusive']}; processed reported raw-like "
        f"{v['processed_as_raw']}; raw-like reported processed {v['raw_as_processed']}")
    lines.append("")
    lines.append(f"{'trace':<23}{'TP':>4}{'FN':>4}{'inc+':>5}{'FP':>4}{'TN':>4}{'inc-':>5}"
                 f"{'n/r':>4}  {'TP rate %':>9} {'95 % Wilson':<14}{'FP rate %':>9} "
                 f"{'95 % Wilson':<14}{'ECE':>6}")
    for tid, c in s["traces"].items():
        ece = s["ece_per_trace"].get(tid, float("nan"))
        lines.append(
            f"{tid:<23}{c['tp']:>4}{c['fn']:>4}{c['inc_pos']:>5}{c['fp']:>4}{c['tn']:>4}"
            f"{c['inc_neg']:>5}{c['not_run']:>4}  {_pct(c['tpr']):>9} {_ci(c['tpr_ci']):<14}"
            f"{_pct(c['fpr']):>9} {_ci(c['fpr_ci']):<14}"
            f"{'   n/a' if not math.isfinite(ece) else f'{ece:6.3f}'}")
    lines.append("(inc+/inc-: inconclusive on a true positive/negative, kept in the rate "
                 "denominators; n/r: trace not in the report; truth unknown excluded)")
    if s["params"]:
        lines.append("")
        lines.append("parameter errors (truly present and called present)")
        for dotted, p in s["params"].items():
            if p["kind"] == "numeric":
                missing = f", no estimate {p['missing']}" if p["missing"] else ""
                lines.append(f"  {dotted:<40} n={p['n']:<4} relative error median "
                             f"{p['median']:.3f}, 95th pct {p['p95']:.3f}{missing}")
            else:
                lines.append(f"  {dotted:<40} n={p['n']:<4} right {p['right']}/{p['n']} "
                             f"({_pct(p['share']).strip()} %)")
    rel = s["reliability"]
    lines.append("")
    lines.append(f"reliability of confidence over {rel['n']} definite calls with known truth "
                 f"(all traces)")
    lines.append(f"  {'bin':<12}{'n':>6}{'mean conf':>11}{'observed':>10}")
    for b in rel["bins"]:
        if b["n"]:
            lines.append(f"  {b['lo']:.1f}-{b['hi']:.1f}    {b['n']:>6}{b['mean_conf']:>11.3f}"
                         f"{b['observed']:>10.3f}")
    ece = rel["ece"]
    lines.append(f"  expected calibration error: "
                 f"{'n/a' if not math.isfinite(ece) else f'{ece:.3f}'}")
    lines.append("")
    for tid, c in s["constant"].items():
        if c["n"] == 0:
            lines.append(f"  confidence of {tid}: not reported")
        elif c["constant"]:
            lines.append(f"  confidence of {tid}: CONSTANT ({c['values'][0]:g}) over {c['n']}")
        else:
            lines.append(f"  confidence of {tid}: {c['distinct']} distinct values over {c['n']}")
    for name_, err in s["errors"]:
        lines.append(f"  failed: {name_}: {err}")
    return "\n".join(lines)


# --------------------------------------------------------------------------- running

class _CaseTimeoutError(Exception):
    pass


def _alarm(signum: int, frame: Any) -> None:
    raise _CaseTimeoutError()


def _slim(report: dict) -> dict:
    """Keep what scoring and calibration need: verdict, statuses, confidences, estimates,
    origins and the decision statistic."""
    traces = {}
    for tid, tr in (report.get("traces") or {}).items():
        ev = tr.get("evidence") or {}
        traces[tid] = {k: tr.get(k) for k in ("status", "confidence", "estimates", "origin")
                       if k in tr}
        if isinstance(ev.get("decision"), dict):
            traces[tid]["evidence"] = {"decision": ev["decision"]}
    return {"verdict": report.get("verdict"), "traces": traces,
            "error": report.get("error")}


def run_one(case: Case, timeout: float = CASE_TIMEOUT_S) -> dict:
    """Materialise and analyse one case (in the calling process); never raises."""
    from app.analysis import analyse_path

    t0 = time.perf_counter()
    row: dict[str, Any] = {"name": case.name, "route": case.route, "truth": case.truth,
                           "report": None, "error": None}
    use_alarm = timeout and hasattr(signal, "SIGALRM")
    old = signal.signal(signal.SIGALRM, _alarm) if use_alarm else None
    if use_alarm:
        signal.alarm(int(math.ceil(timeout)))
    try:
        with tempfile.TemporaryDirectory(prefix="rawproof-validate-") as tmp:
            path, kwargs = case.materialise(Path(tmp))
            rep = analyse_path(path, workers=1, **kwargs)
            if rep.get("error"):
                row["error"] = f"input error: {rep['error'].get('code')}"
            else:
                row["report"] = _slim(rep)
    except _CaseTimeoutError:
        row["error"] = f"timeout after {timeout:.0f} s"
    except Exception as exc:  # counted, not fatal
        row["error"] = f"{type(exc).__name__}: {exc}"[:300]
    finally:
        if use_alarm:
            signal.alarm(0)
            signal.signal(signal.SIGALRM, old)
    row["seconds"] = time.perf_counter() - t0
    return row


def _task(args: tuple[Case, float]) -> dict:
    return run_one(*args)


def run_cases(cases: Sequence[Case], *, processes: int = 2, timeout: float = CASE_TIMEOUT_S,
              progress: bool = True) -> list[dict]:
    """Analyse every case in a pool of ``processes`` (one case per task), in case order."""
    if not cases:
        return []
    if processes <= 1:
        return [run_one(c, timeout) for c in cases]
    ctx = multiprocessing.get_context("fork" if sys.platform != "win32" else "spawn")
    rows: list[dict] = []
    with ctx.Pool(processes, maxtasksperchild=20) as pool:
        for i, row in enumerate(pool.imap(_task, [(c, timeout) for c in cases], chunksize=1)):
            rows.append(row)
            if progress:
                print(f"\r  {i + 1}/{len(cases)} {row['name'][:50]:<50}", end="",
                      file=sys.stderr, flush=True)
    if progress:
        print(file=sys.stderr)
    return rows


def load_set(name: str, *, quick: bool = False) -> list[Case] | str:
    """The cases of a set, or a message saying why the set is skipped."""
    try:
        if name in ("heldout", "dev"):
            try:
                import bench.sim2 as sim2
            except ImportError as exc:
                return f"bench.sim2 is not available ({exc})"
            return list(sim2.cases(name, quick=quick))
        if name == "shelf":
            from bench import shelf
            return shelf.cases(quick=quick)
        if name == "insample":
            from bench import insample
            return insample.cases(quick=quick)
    except Exception as exc:  # a broken set is reported, the others still run
        return f"could not build the set: {type(exc).__name__}: {exc}"
    return f"unknown set {name!r}"


def header_line() -> str:
    """Date and short commit of the working tree."""
    try:
        rev = subprocess.run(["git", "rev-parse", "--short", "HEAD"], capture_output=True,
                             text=True, cwd=Path(__file__).resolve().parent, timeout=10
                             ).stdout.strip() or "unknown"
    except (OSError, subprocess.SubprocessError):
        rev = "unknown"
    return f"rawproof validation, {_dt.date.today().isoformat()}, commit {rev}"


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="a few cases per set (smoke run)")
    ap.add_argument("--sets", default="heldout,shelf,insample",
                    help="comma-separated: heldout, shelf, insample, dev")
    ap.add_argument("--json", dest="json_out", help="write the tables and per-case rows here")
    ap.add_argument("--processes", type=int, default=2)
    ap.add_argument("--timeout", type=float, default=CASE_TIMEOUT_S, help="seconds per case")
    args = ap.parse_args(argv)
    wanted = [s.strip() for s in args.sets.split(",") if s.strip()]
    order = [s for s in SET_ORDER if s in wanted] + [s for s in wanted if s not in SET_ORDER]
    t0 = time.perf_counter()
    print(header_line())
    print("thresholds, models and calibration maps are fitted on insample and dev only; "
          "heldout and shelf only report")
    out: dict[str, Any] = {"header": header_line(), "sets": {}}
    for name in order:
        cases = load_set(name, quick=args.quick)
        if isinstance(cases, str):
            print(f"\n== {name}: skipped: {cases} ==")
            out["sets"][name] = {"skipped": cases}
            continue
        ts = time.perf_counter()
        rows = run_cases(cases, processes=args.processes, timeout=args.timeout,
                         progress=sys.stderr.isatty())
        scores = score_set(rows)
        print()
        print(format_set(name, scores))
        print(f"  ({time.perf_counter() - ts:.0f} s)")
        out["sets"][name] = {"scores": scores, "rows": [
            {k: r[k] for k in ("name", "route", "truth", "report", "error", "seconds")}
            for r in rows]}
    print(f"\ntotal {time.perf_counter() - t0:.0f} s")
    if args.json_out:
        Path(args.json_out).write_text(json.dumps(out, indent=1, default=str), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
