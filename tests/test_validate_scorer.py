"""The validation scorer (bench/validate.py) against hand-written reports and published values."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from bench import validate as v

ROOT = Path(__file__).resolve().parents[1]


def _rep(verdict: str, **traces: tuple[str, float] | tuple[str, float, dict]) -> dict:
    out = {}
    for tid, t in traces.items():
        out[tid] = {"status": t[0], "confidence": t[1], "estimates": t[2] if len(t) > 2 else {}}
    return {"verdict": verdict, "traces": out}


def _row(truth: dict, report: dict | None, name: str = "c") -> dict:
    return {"name": name, "truth": truth, "report": report, "error": None if report else "boom"}


def test_wilson_interval_published_values() -> None:
    """Wilson (1927) score interval. Newcombe, Stat. Med. 17 (1998) 857-872, Table II gives
    81/263 -> 0.2553-0.3662 and 15/148 -> 0.0624-0.1605 (values recalled from memory); for
    k = 0 the upper bound has the closed form z^2 / (n + z^2)."""
    lo, hi = v.wilson_interval(81, 263)
    assert (round(lo, 4), round(hi, 4)) == (0.2553, 0.3662)
    lo, hi = v.wilson_interval(15, 148)
    assert (round(lo, 4), round(hi, 4)) == (0.0624, 0.1605)
    z2 = 1.959964**2
    assert v.wilson_interval(0, 10) == (0.0, pytest.approx(z2 / (10 + z2)))


def test_make_truth_verdict_rule() -> None:
    """The contract's verdict rule (shared/REPORT_CONTRACT.md) applied to truths."""
    all_absent = {t: "absent" for t in v.TRACE_IDS}
    assert v.make_truth(all_absent)["verdict"] == "raw-like"
    pf = dict(all_absent, partial_fourier="present")
    assert v.make_truth(pf, origin={"partial_fourier": "acquisition"})["verdict"] == "raw-like"
    assert v.make_truth(pf)["verdict"] == "processed"
    assert v.make_truth({"zero_filling": "absent"})["verdict"] == "unknown"
    assert v.make_truth({})["traces"]["kspace_synthesis"] == "unknown"


def test_tables_on_hand_written_reports() -> None:
    """Counts worked by hand: TP/FN/FP/TN, inconclusive kept apart, a trace missing from a
    report counted as not run, an analysis error counted, unknown truth excluded."""
    raw = v.make_truth({t: "absent" for t in v.TRACE_IDS})
    zf = v.make_truth(dict({t: "absent" for t in v.TRACE_IDS}, zero_filling="present",
                           magnitude_only="present"),
                      params={"zero_filling.rows.padding_factor": 2.0,
                              "kspace_filtering.window": "hann"})
    zf["traces"]["kspace_filtering"] = "present"  # hand-set for the categorical check
    shelf = v.make_truth({"magnitude_only": "present"})
    rows = [
        _row(raw, _rep("raw-like", zero_filling=("absent", 0.9), magnitude_only=("absent", 0.8))),
        _row(raw, _rep("processed", zero_filling=("present", 0.7),
                       magnitude_only=("inconclusive", 0.5))),
        _row(zf, _rep("processed",
                      zero_filling=("present", 0.95, {"rows": {"padding_factor": 2.2}}),
                      magnitude_only=("present", 0.9),
                      kspace_filtering=("present", 0.6, {"window": "hann"}))),
        _row(zf, _rep("raw-like", zero_filling=("present", 0.6,
                                                {"rows": {"padding_factor": 1.9}}),
                      magnitude_only=("absent", 0.7),
                      kspace_filtering=("present", 0.6, {"window": "hamming"}))),
        _row(shelf, _rep("processed", magnitude_only=("present", 0.99),
                         zero_filling=("present", 0.99))),
        _row(raw, None),
    ]
    vt = v.verdict_table(rows)
    assert (vt["known"], vt["right"], vt["errors"]) == (5, 3, 1)
    assert vt["processed_as_raw"] == 1 and vt["raw_as_processed"] == 1
    assert vt["accuracy"] == pytest.approx(3 / 5)

    tt = v.trace_table(rows)
    z = tt["zero_filling"]
    assert (z["tp"], z["fn"], z["fp"], z["tn"], z["errors"]) == (2, 0, 1, 1, 1)
    m = tt["magnitude_only"]  # the shelf row's truth present, two zf rows, two raw rows
    assert (m["tp"], m["fn"], m["fp"], m["tn"], m["inc_neg"]) == (2, 1, 0, 1, 1)
    assert m["tpr"] == pytest.approx(2 / 3) and m["fpr"] == pytest.approx(0 / 2)
    assert tt["kspace_synthesis"]["not_run"] == 4  # known truth, never reported
    assert tt["background_masking"]["not_run"] == 4

    pt = v.param_table(rows)
    num = pt["zero_filling.rows.padding_factor"]
    assert num["n"] == 2
    assert num["median"] == pytest.approx((0.1 + 0.05) / 2)
    assert pt["kspace_filtering.window"]["right"] == 1 and pt["kspace_filtering.window"]["n"] == 2


def test_reliability_and_ece_by_hand() -> None:
    """ECE as defined by Naeini et al. (2015) and Guo et al. (2017): sum over bins of
    n_b / N |acc_b - conf_b|; hand-computed value (4 * 0.2 + 2 * 0.45) / 6."""
    calls = [("a", 0.95, True)] * 3 + [("a", 0.95, False)] + [("b", 0.55, True)] * 2
    rel = v.reliability(calls)
    assert rel["n"] == 6
    assert rel["ece"] == pytest.approx((4 * 0.2 + 2 * 0.45) / 6)
    top = rel["bins"][9]
    assert top["n"] == 4 and top["observed"] == pytest.approx(0.75)
    assert v.reliability([("a", 1.0, True)])["bins"][9]["n"] == 1  # 1.0 falls in the top bin


def test_constant_confidence_flag() -> None:
    """A trace whose every call carries the same confidence is flagged constant."""
    t = v.make_truth({})
    rows = [_row(t, _rep("processed", zero_filling=("absent", 0.7), resampling=("absent", r)))
            for r in (0.6, 0.8, 0.9)]
    c = v.constant_confidence(rows)
    assert c["zero_filling"]["constant"] and not c["resampling"]["constant"]
    assert c["kspace_synthesis"]["n"] == 0


@pytest.mark.slow
def test_quick_run_prints_every_table(tmp_path: Path) -> None:
    """Smoke run of ``python -m bench.validate --quick`` on the shelf (real packaged MR files)
    and the in-sample set: the tables print, the JSON's scores are what the pure scorer
    gives for its rows, and the missing simulator set is skipped, not fatal."""
    out = tmp_path / "v.json"
    res = subprocess.run([sys.executable, "-m", "bench.validate", "--quick", "--sets",
                          "shelf,insample", "--json", str(out)], cwd=ROOT, capture_output=True,
                         text=True, timeout=300)
    assert res.returncode == 0, res.stderr[-2000:]
    text = res.stdout
    assert text.index("== shelf") < text.index("== insample")
    assert "expected calibration error" in text and "95 % Wilson" in text
    data = json.loads(out.read_text())
    for name in ("shelf", "insample"):
        s = data["sets"][name]
        assert s["scores"]["n_cases"] == len(s["rows"]) > 0
        again = v.score_set(s["rows"])
        assert json.loads(json.dumps(again["verdict"])) == s["scores"]["verdict"]
