"""The demo lab end to end: ``rawproof demo`` into a fresh data folder, then every
demo source checked against the generator's own truth (demo_data/generate.py's
manifest, built from demo_data/synth.py with known processing).

For each trace the generator put in, the stored report must find it with the
stated tolerance, the methods statement (app/methods.py) must name it, and its
figure (app/web/figures.py), as ``rawproof demo`` cached it for the page, must be
a decodable, non-blank PNG.
Tolerances are stated per trace below. JPEG quality is on the IJG scale
(libjpeg ``jcparam.c``; Pillow's encoder wrote the files at quality 75).
"""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from app.cli import main
from app.config import Settings
from app.methods import TRACE_NAMES, methods_statement
from app.store import service
from app.store.db import session_scope
from app.traces.report import analysers
from app.web import figures
from demo_data.generate import MEMBERS, SOURCES

pytestmark = pytest.mark.slow

FIGURE_OF = {tid: spec.name for spec in figures.FIGURES.values() for tid in spec.trace_ids}


@pytest.fixture(scope="module")
def loaded(tmp_path_factory: pytest.TempPathFactory) -> dict:
    data = tmp_path_factory.mktemp("demo") / "rawproof-data"
    out = io.StringIO()
    import contextlib

    with contextlib.redirect_stdout(out):
        rc = main(["demo", "--data", str(data), "--quiet"])
    assert rc == 0
    manifest = json.loads((data / "demo-sources" / "manifest.json").read_text())
    settings = Settings(data_dir=data)
    reports, decisions, comments, history, report_ids = {}, {}, {}, {}, {}
    with session_scope(settings, write=False) as s:
        for ds in service_datasets(s):
            rep = service.get_current_report(s, ds.id)
            reports[ds.name] = rep.data if rep else None
            report_ids[ds.name] = rep.id if rep else None
            dec = service.current_decision(s, ds)
            history[ds.name] = [d.outcome for d in service.list_decisions(s, ds.id)]
            decisions[ds.name] = ({"outcome": dec.outcome, "rationale": dec.rationale}
                                  if dec else None)
            comments[ds.name] = [c.body for c in service.list_comments(s, ds.id)]
    return {"data": data, "stdout": out.getvalue(), "manifest": manifest, "reports": reports,
            "decisions": decisions, "comments": comments, "history": history,
            "report_ids": report_ids, "settings": settings}


def service_datasets(session) -> list:  # noqa: ANN001 - a SQLAlchemy session
    from sqlalchemy import select

    from app.store.models import Dataset

    return list(session.scalars(select(Dataset).order_by(Dataset.id)))


def _source(loaded: dict, slug: str) -> dict:
    return next(s for s in loaded["manifest"]["sources"] if s["slug"] == slug)


def test_accounts_printed_and_usable(loaded: dict) -> None:
    """Every demo member's name and password is printed and signs in."""
    text = loaded["stdout"]
    with session_scope(loaded["settings"], write=False) as s:
        for m in MEMBERS:
            assert m["username"] in text and m["password"] in text
            assert service.authenticate(s, m["username"], m["password"]) is not None
    assert "research aid, not a medical device" in text


def test_every_source_loaded_with_comments_and_decisions(loaded: dict) -> None:
    """Eight sources, each a dataset with a report; comments and decisions as in the manifest."""
    man = loaded["manifest"]
    assert len(man["sources"]) == len(SOURCES) == 8
    formats = {s["format"] for s in man["sources"]}
    assert {"dicom", "nifti", "npz", "npy", "png", "jpeg"} <= formats
    for src in man["sources"]:
        assert loaded["reports"][src["name"]] is not None, src["slug"]
        assert len(loaded["comments"][src["name"]]) == len(src["comments"])
        dec = src["decision"]
        got = loaded["decisions"][src["name"]]
        assert (got is None) == (dec is None)
        if dec:
            assert got["outcome"] == dec["outcome"]
            # history newest first: the current decision, then the earlier ones, kept
            earlier = [d["outcome"] for d in reversed(src["earlier_decisions"])]
            assert loaded["history"][src["name"]] == [dec["outcome"], *earlier]
        assert src["size_bytes"] < 5_000_000  # "each small (a few MB)"
    assert any(s["decision"] is None for s in man["sources"])  # some await review


def test_refuses_non_empty_folder(tmp_path: Path) -> None:
    """A non-empty folder is left alone (exit code 2); --force replaces only a folder
    that holds a rawproof data folder's database, never an arbitrary folder."""
    data = tmp_path / "d"
    data.mkdir()
    (data / "keep.txt").write_text("mine")
    only = ["--quiet", "--only", "half-fourier"]
    assert main(["demo", "--data", str(data), *only]) == 2
    assert main(["demo", "--data", str(data), "--force", *only]) == 2
    assert (data / "keep.txt").read_text() == "mine"
    fresh = tmp_path / "fresh"
    assert main(["demo", "--data", str(fresh), *only]) == 0
    assert main(["demo", "--data", str(fresh), *only]) == 2  # not empty now
    (fresh / "marker.txt").write_text("old run")
    assert main(["demo", "--data", str(fresh), "--force", *only]) == 0
    assert not (fresh / "marker.txt").exists()
    assert (fresh / "rawproof.sqlite3").is_file()


def _close(a: float, b: float, tol: float) -> bool:
    return a is not None and abs(float(a) - float(b)) <= tol


def _check_estimates(tid: str, truth: dict, est: dict) -> list[str]:
    """Compare one trace's estimates with the truth; return what is off."""
    bad = []
    if tid == "zero_filling":  # support fraction within 0.03
        for axis in ("rows", "cols"):
            t = truth[axis]["support_fraction"]
            e = (est.get(axis) or {}).get("support_fraction")
            if not _close(e, t, 0.03):
                bad.append(f"{axis} support {e} vs {t}")
    elif tid == "coil_combination":  # law exact, channels within 1
        if est.get("noise_model") != truth["noise_model"]:
            bad.append(f"noise model {est.get('noise_model')}")
        if not _close(est.get("effective_channels"), truth["effective_channels"], 1.0):
            bad.append(f"channels {est.get('effective_channels')}")
    elif tid == "magnitude_only":
        if est.get("domain") != truth["domain"]:
            bad.append(f"domain {est.get('domain')}")
    elif tid == "lossy_compression":  # method and origin exact, quality within 3
        if est.get("method") != truth["method"]:
            bad.append(f"method {est.get('method')}")
        if not _close(est.get("quality"), truth["quality"], 3):
            bad.append(f"quality {est.get('quality')}")
        if est.get("block_origin") != truth["block_origin"]:
            bad.append(f"origin {est.get('block_origin')}")
    elif tid == "resampling":  # factor within 0.05
        for axis in ("rows", "cols"):
            e = (est.get(axis) or {}).get("factor")
            if not _close(e, truth[axis]["factor"], 0.05):
                bad.append(f"{axis} factor {e}")
    elif tid == "intensity_quantization":
        # levels exact, bits within 0.15; the clipped fraction counts at least the
        # smaller clipped tail and at most both tails (+0.005)
        if est.get("distinct_levels") != truth["distinct_levels"]:
            bad.append(f"levels {est.get('distinct_levels')}")
        if not _close(est.get("effective_bits"), truth["effective_bits"], 0.15):
            bad.append(f"bits {est.get('effective_bits')}")
        c = est.get("clipped_fraction")
        lo = 0.5 * min(truth["clipped_low_fraction"], truth["clipped_high_fraction"])
        if c is None or not lo <= c <= truth["clipped_fraction"] + 0.005:
            bad.append(f"clipped {c}")
    elif tid == "background_masking":  # within 0.05
        if not _close(est.get("zero_background_fraction"), truth["zero_background_fraction"],
                      0.05):
            bad.append(f"zero background {est.get('zero_background_fraction')}")
    elif tid == "kspace_filtering":
        if not str(est.get("window") or "").lower().startswith(truth["window"]):
            bad.append(f"window {est.get('window')}")
    elif tid == "partial_fourier":  # acquired fraction within 0.04
        for axis, t in truth.items():
            e = (est.get(axis) or {}).get("fraction")
            if not _close(e, t["fraction"], 0.04):
                bad.append(f"{axis} fraction {e}")
    return bad


def _png_ok(png: bytes | None) -> bool:
    if not png:
        return False
    im = Image.open(io.BytesIO(png))
    im.load()
    px = np.asarray(im.convert("L"), dtype=float)
    return im.format == "PNG" and px.std() > 10 and px.shape[0] > 200


# Known defect, kept visible: on the Hann-apodized series the window's roll-off into
# the noise floor is taken for a zero-filling edge at about 0.8 of the matrix, so the
# window is fitted on too narrow a support and named "gaussian"/"hamming". Strict, so
# the mark must go when the spectral analysers tell a window's taper from a
# zero-fill step.
_KNOWN = {"filtered-flair": pytest.mark.xfail(
    strict=True, reason="Hann roll-off read as a zero-fill edge; window misnamed")}


@pytest.mark.parametrize("slug", [pytest.param(s["slug"], marks=_KNOWN.get(s["slug"], ()))
                                  for s in SOURCES])
def test_source_truth_found_named_and_drawn(loaded: dict, slug: str) -> None:
    """For each trace the generator put in: found (with the tolerances of
    _check_estimates), named in the methods statement, and its figure drawn."""
    src = _source(loaded, slug)
    report = loaded["reports"][src["name"]]
    text = methods_statement(report, loaded["decisions"][src["name"]])
    registered = set(analysers())
    missing = []
    for tid, truth in src["truth"]["present"].items():
        if tid not in registered:
            missing.append(tid)
            continue
        trace = report["traces"][tid]
        assert trace["status"] == "present", f"{slug}: {tid}: {trace['summary']}"
        assert not _check_estimates(tid, truth, trace["estimates"]), (
            f"{slug}: {tid}: {_check_estimates(tid, truth, trace['estimates'])}")
        assert TRACE_NAMES[tid] in text
        if tid in FIGURE_OF:
            # the figure rawproof demo rendered into the page's cache (what the page serves)
            cached = (loaded["data"] / "reports" / str(loaded["report_ids"][src["name"]])
                      / "figures" / f"{FIGURE_OF[tid]}.png")
            assert cached.is_file(), f"{slug}: {tid}: no {cached.name} in the figure cache"
            assert _png_ok(cached.read_bytes()), f"{slug}: {tid} figure"
    for tid in src["truth"]["absent"]:
        if tid in report["traces"]:
            assert report["traces"][tid]["status"] != "present", (
                f"{slug}: {tid} found but not applied: {report['traces'][tid]['summary']}")
    if missing:
        pytest.skip(f"analysers not written yet for {missing}; the other traces were checked")
