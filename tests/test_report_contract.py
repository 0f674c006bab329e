"""The report mechanism and the contract of shared/REPORT_CONTRACT.md.

These check the project's own public interface (the contract is the reference),
not an analyser's numbers; analyser accuracy is tested beside each analyser.
"""

from __future__ import annotations

import json
import subprocess
import sys

import jsonschema
import numpy as np
import pytest

from app.analysis import analyse_path
from app.cli import main
from app.io.volume import Volume
from app.schema import report_schema
from app.traces import base
from app.traces.report import (
    analyse_volume,
    analysers,
    combine_groups,
    verdict_of,
)

VALIDATOR = jsonschema.Draft202012Validator(report_schema())


@pytest.fixture(autouse=True)
def _real_analysers_registered_first():
    """Import the real analysers before a test swaps in a copy of the registry, so
    that their registrations land in the real one, not in a copy thrown away."""
    analysers()


def _validate(obj: dict) -> None:
    errors = sorted(VALIDATOR.iter_errors(obj), key=lambda e: list(e.path))
    assert not errors, [f"{list(e.path)}: {e.message}" for e in errors[:5]]


@pytest.mark.parametrize(
    ("statuses", "verdict"),
    [
        (["absent", "absent"], "raw-like"),
        (["absent", "present"], "processed"),
        (["inconclusive", "present"], "processed"),
        (["absent", "inconclusive"], "inconclusive"),
        ([], "inconclusive"),
    ],
)
def test_verdict_rule(statuses, verdict):
    """REPORT_CONTRACT.md: processed if any present, raw-like if all absent, else inconclusive."""
    traces = {f"t{i}": {"status": s} for i, s in enumerate(statuses)}
    assert verdict_of(traces) == verdict


def test_one_registered_function_plugs_in(monkeypatch):
    """DESIGN: an analyser plugs in by registering one function; no other file changes."""
    monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))

    @base.register("test_constant_image", default_estimates={"value": None})
    def _constant(volume):
        arr = volume.to_array()
        flat = bool(np.ptp(arr) == 0)
        return base.Trace(
            "test_constant_image",
            "present" if flat else "absent",
            1.0,
            "constant" if flat else "varies",
            {"value": float(arr.flat[0])},
        )

    rep = analyse_volume(Volume.from_array(np.full((2, 8, 8), 3.0)))
    assert rep["traces"]["test_constant_image"]["status"] == "present"
    assert rep["traces"]["test_constant_image"]["estimates"]["value"] == 3.0
    assert rep["verdict"] == "processed"
    _validate(rep)


def test_failing_analyser_gives_inconclusive_with_error(monkeypatch):
    """A failing analyser yields an inconclusive trace with the error, never a crash."""
    monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))

    @base.register("test_broken", default_estimates={"rows": None})
    def _broken(volume):
        raise ZeroDivisionError("deliberate")

    rep = analyse_volume(Volume.from_array(np.ones((8, 8))))
    t = rep["traces"]["test_broken"]
    assert t["status"] == "inconclusive"
    assert "ZeroDivisionError" in t["evidence"]["error"]
    assert t["estimates"] == {"rows": None}
    assert rep["verdict"] != "raw-like"


def test_analyser_missing_required_estimates_is_caught(monkeypatch):
    monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))

    @base.register("test_incomplete", default_estimates={"needed": None})
    def _incomplete(volume):
        return base.Trace("test_incomplete", "absent", 0.9, "forgot a key", {})

    rep = analyse_volume(Volume.from_array(np.ones((8, 8))))
    assert rep["traces"]["test_incomplete"]["status"] == "inconclusive"
    assert "needed" in rep["traces"]["test_incomplete"]["summary"]


def test_shared_step_runs_once_per_volume(monkeypatch):
    """Two analysers that name the same shared step get one computation of it
    (the plan's rule: shared steps are computed once per Volume)."""
    from app.traces import plan

    monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))
    calls = []

    def counted(volume):
        calls.append(1)
        return 42

    monkeypatch.setitem(plan.STEPS, "test_shared", counted)
    def make(name):
        def fn(volume, *, test_shared):
            return base.Trace(name, "absent", 1.0, f"shared {test_shared}", {})
        return fn

    for name in ("test_a", "test_b"):
        base.register(name)(make(name))
    rep = analyse_volume(Volume.from_array(np.ones((8, 8))))
    assert calls == [1]
    assert rep["traces"]["test_a"]["summary"] == "shared 42"


def test_plan_rejects_an_undeclared_need():
    """An analyser naming a parameter that is neither a step nor an input is refused
    when the plan reads its signature, not silently given None."""
    from app.traces import plan

    def bad(volume, *, no_such_step):
        return None

    with pytest.raises(ValueError, match="no_such_step"):
        plan.needs_of(bad)


def test_failed_shared_step_makes_its_analysers_inconclusive(monkeypatch):
    """A shared step that raises makes every analyser needing it inconclusive with
    the step named, while an optional need gets None."""
    from app.traces import plan

    monkeypatch.setattr(base, "_REGISTRY", dict(base._REGISTRY))

    def broken(volume):
        raise ZeroDivisionError("deliberate")

    monkeypatch.setitem(plan.STEPS, "test_broken_step", broken)

    @base.register("test_needs")
    def _needs(volume, *, test_broken_step):
        return base.Trace("test_needs", "absent", 1.0, "unreachable", {})

    @base.register("test_optional")
    def _optional(volume, *, test_broken_step=None):
        return base.Trace("test_optional", "absent", 1.0, f"got {test_broken_step}", {})

    rep = analyse_volume(Volume.from_array(np.ones((8, 8))))
    t = rep["traces"]["test_needs"]
    assert t["status"] == "inconclusive" and "test_broken_step" in t["summary"]
    assert rep["traces"]["test_optional"]["summary"] == "got None"


def test_verdict_rule_separates_acquisition_from_processing():
    """shared/REPORT_CONTRACT.md: a trace present with origin acquisition does not by
    itself make the verdict processed; with origin processing (the default) it does."""
    absent = {"status": "absent"}
    acq = {"status": "present", "origin": "acquisition"}
    proc = {"status": "present"}
    assert verdict_of({"a": absent, "b": acq}) == "raw-like"
    assert verdict_of({"a": absent, "b": acq, "c": proc}) == "processed"
    assert verdict_of({"a": {"status": "inconclusive"}, "b": acq}) == "inconclusive"


def test_group_merge_keeps_most_severe_and_verdict_rule():
    g1 = {
        "group": "a",
        "input": {"shape": [2, 8, 8]},
        "warnings": [],
        "header": {"declared": {}, "notes": []},
        "traces": {
            "x": {
                "status": "absent",
                "confidence": 0.9,
                "summary": "s",
                "estimates": {},
                "evidence": {},
            }
        },
    }
    g2 = {
        "group": "b",
        "input": {"shape": [4, 8, 8]},
        "warnings": ["w"],
        "header": {"declared": {}, "notes": []},
        "traces": {
            "x": {
                "status": "present",
                "confidence": 0.5,
                "summary": "p",
                "estimates": {},
                "evidence": {},
            }
        },
    }
    rep = combine_groups([g1, g2], path="p", fmt="folder", n_files=2)
    assert rep["traces"]["x"]["status"] == "present"
    assert rep["traces"]["x"]["evidence"]["group"] == "b"
    assert rep["verdict"] == "processed"
    assert [g["group"] for g in rep["groups"]] == ["a", "b"]
    assert rep["warnings"] == ["[b] w"]


def test_cli_report_is_contract_valid(tmp_path, capsys):
    """`rawproof analyse PATH --json` prints one contract-valid object; with -o the same
    object goes to the file only (stdout stays free for the caller's own output)."""
    p = tmp_path / "scan.npy"
    np.save(p, np.random.default_rng(0).random((3, 32, 32)).astype(np.float32))
    assert main(["analyse", str(p), "--json", "--quiet"]) == 0
    printed = json.loads(capsys.readouterr().out)
    out = tmp_path / "r.json"
    assert main(["analyse", str(p), "--json", "-o", str(out), "--quiet"]) == 0
    assert capsys.readouterr().out.strip() == ""
    written = json.loads(out.read_text())
    assert written["traces"] == printed["traces"] and written["verdict"] == printed["verdict"]
    _validate(printed)
    assert printed["input"]["shape"] == [3, 32, 32]
    assert printed["input"]["format"] == "npy"
    assert "not a medical device" in printed["caution"]


def test_unreadable_input_exit_code_2_and_error_object(tmp_path):
    """Contract: exit code 2, the error object on stdout, one human line on stderr."""
    proc = subprocess.run(
        [sys.executable, "-m", "app.cli", "analyse", str(tmp_path / "missing.dcm"), "--json"],
        capture_output=True,
        text=True,
        check=False,
    )
    assert proc.returncode == 2
    obj = json.loads(proc.stdout)
    _validate(obj)
    assert obj["error"]["code"]
    assert "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


def test_sidecar_sets_domain(tmp_path):
    """Contract: scan.npy beside scan.json holding {"domain": "kspace", "coil_axis": 0}."""
    p = tmp_path / "scan.npy"
    np.save(p, (np.ones((4, 16, 16)) + 1j).astype(np.complex64))
    (tmp_path / "scan.json").write_text('{"domain": "kspace", "coil_axis": 0}')
    rep = analyse_path(str(p))
    assert rep["input"]["domain"] == "kspace"
    assert rep["input"]["value_type"] == "complex"
    _validate(rep)


def test_threaded_analysis_gives_the_sequential_report():
    """Analysers on two threads (shared steps locked, busy ones deferred) give the same
    traces and warnings as one after the other (workers=1), on a zero-filled RSS
    volume where every shared step is used (the spectrum, the background, the JPEG
    finding)."""
    from demo_data import synth

    mag, _ = synth.zero_filled_magnitude((48, 48), (2.0, 2.0), n_coils=4, n_slices=12,
                                         sigma=0.01, seed=3)
    u16 = np.round(mag / mag.max() * 4000).astype(np.uint16)
    reports = [analyse_volume(Volume.from_array(u16), workers=w) for w in (1, 2, 2)]
    for rep in reports:
        rep.pop("timing")
    assert reports[0]["traces"]["zero_filling"]["status"] == "present"
    assert json.dumps(reports[1], sort_keys=True) == json.dumps(reports[0], sort_keys=True)
    assert json.dumps(reports[2], sort_keys=True) == json.dumps(reports[0], sort_keys=True)


def test_confidence_is_the_calibration_maps_probability(monkeypatch):
    """With a map fitted on (statistic, truth) pairs, a present call's confidence is the
    map's P(present | statistic) and an absent call's is 1 - P; without a statistic the
    analyser's own probability stays, and the basis says which (isotonic calibration,
    Zadrozny and Elkan 2002: the map is the observed frequency of the positive class)."""
    from app.traces import calibration
    from app.traces.report import calibrated

    # truth: statistic below 0 -> never present, above 1 -> always present
    values = [-2.0] * 50 + [2.0] * 50
    present = [False] * 50 + [True] * 50
    cmap = calibration.fit_map(values, present, statistic="s")
    monkeypatch.setattr(calibration, "load_maps", lambda: {"t": cmap})
    dec = {"statistic": "s", "value": 2.0}
    hi = calibrated(base.Trace("t", "present", 0.5, "x", {}, {"decision": dict(dec)}))
    assert hi.confidence == pytest.approx(cmap(2.0)) and hi.confidence > 0.95
    lo = calibrated(base.Trace("t", "absent", 0.5, "x", {},
                               {"decision": {"statistic": "s", "value": -2.0}}))
    assert lo.confidence == pytest.approx(1 - cmap(-2.0)) and lo.confidence > 0.95
    assert lo.evidence["confidence_basis"].startswith("calibration map")
    wrong = calibrated(base.Trace("t", "absent", 0.5, "x", {},
                                  {"decision": {"statistic": "s", "value": 2.0}}))
    assert wrong.confidence < 0.05
    bare = calibrated(base.Trace("t", "present", 0.42, "x", {}, {}))
    assert bare.confidence == 0.42 and bare.evidence["confidence_basis"].startswith("analyser")


def test_a_call_the_map_says_is_more_often_wrong_becomes_inconclusive(monkeypatch):
    """A present call at a statistic where the development data were present in only 20 %
    of cases is not a call rawproof can make: it is reported inconclusive with the reason,
    the analyser's call kept in the evidence (isotonic calibration, Zadrozny and Elkan
    2002; built truth: 20 % present at the statistic value 1)."""
    from app.traces import calibration
    from app.traces.report import calibrated

    cmap = calibration.fit_map([1.0] * 50, [True] * 10 + [False] * 40, statistic="s")
    monkeypatch.setattr(calibration, "load_maps", lambda: {"t": cmap})
    t = calibrated(base.Trace("t", "present", 0.9, "found it", {},
                              {"decision": {"statistic": "s", "value": 1.0}}))
    # the single block gets the rule of succession: (10 + 1) / (50 + 2) = 21 %
    assert t.status == "inconclusive" and "21 %" in t.summary
    assert t.evidence["uncalibrated_call"]["status"] == "present"
    assert t.confidence == pytest.approx(min(cmap(1.0), 1 - cmap(1.0)))
