"""The dataset page's evidence in headless Chromium against a real ``rawproof serve``.

The data folder is made by the README's own command, ``rawproof demo`` (a
subset of its invented sources, for speed), then served by a real server
(tests/server_harness.py). Checks: every evidence image answers HTTP 200, is a
PNG that decodes (Pillow) and is not blank; the calculator's number equals
``rawproof sampling --from-report`` for the same inputs; the methods statement
names every trace the report found; the copy button puts that text on the
clipboard; the slice viewer steps by button and keyboard; the print stylesheet
applies. Screenshots go to test-artifacts/ (gitignored).
"""

from __future__ import annotations

import io
import json
import re
import subprocess
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from app.methods import TRACE_NAMES
from tests.server_harness import RAWPROOF, REPO, running_server

pytestmark = [pytest.mark.browser, pytest.mark.server]

playwright_api = pytest.importorskip("playwright.sync_api")
CHROMIUM = Path("/usr/bin/chromium")
ARTIFACTS = REPO / "test-artifacts"
SUBSET = ["openbrain-magnitude", "teaching-jpeg"]
MEMBER = ("brandt", "larchmere-brandt-demo")  # printed by rawproof demo


@pytest.fixture(scope="module")
def demo_server(tmp_path_factory: pytest.TempPathFactory):
    data = tmp_path_factory.mktemp("browser") / "rawproof-data"
    only = [a for slug in SUBSET for a in ("--only", slug)]
    res = subprocess.run([*RAWPROOF, "demo", "--data", str(data), "--quiet", *only],
                         capture_output=True, text=True, timeout=300, cwd=REPO)
    assert res.returncode == 0, res.stderr
    assert MEMBER[1] in res.stdout
    manifest = json.loads((data / "demo-sources" / "manifest.json").read_text())
    with running_server(data, worker=False) as srv:
        yield srv, manifest


@pytest.fixture(scope="module")
def browser():
    if not CHROMIUM.exists():
        pytest.skip("Debian chromium is not installed at /usr/bin/chromium")
    with playwright_api.sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), args=[
            "--no-sandbox", "--disable-gpu", "--disable-background-networking",
            "--disable-component-update", "--disable-sync", "--no-first-run"])
        yield b
        b.close()


@pytest.fixture(scope="module")
def page(browser, demo_server):
    srv, _ = demo_server
    ctx = browser.new_context(viewport={"width": 1366, "height": 900},
                              base_url=srv.base_url)
    ctx.grant_permissions(["clipboard-read", "clipboard-write"], origin=srv.base_url)
    pg = ctx.new_page()
    pg.goto("/login")
    pg.fill("input[name=name]", MEMBER[0])
    pg.fill("input[name=password]", MEMBER[1])
    pg.click("button[type=submit]")
    pg.wait_for_url(re.compile(r".*/$|.*/registry.*|.*/datasets.*"))
    yield pg
    ctx.close()


def _dataset_ids(demo_server) -> dict[str, int]:
    srv, manifest = demo_server
    client = srv.login(*MEMBER)
    ids = {}
    for i in range(1, len(manifest["sources"]) + 1):
        r = client.get(f"/datasets/{i}")
        assert r.status_code == 200
        for src in manifest["sources"]:
            if src["name"] in r.text.replace("&#39;", "'"):
                ids[src["slug"]] = i
    client.close()
    return ids


@pytest.fixture(scope="module")
def ids(demo_server) -> dict[str, int]:
    got = _dataset_ids(demo_server)
    assert set(got) == set(SUBSET)
    return got


def _open(page, dataset_id: int) -> None:
    page.goto(f"/datasets/{dataset_id}")
    page.wait_for_load_state("networkidle")


def test_every_figure_loads_decodes_and_is_not_blank(page, ids) -> None:
    """All evidence images of every loaded demo page: HTTP 200, PNG, decodes, std > 8."""
    ARTIFACTS.mkdir(exist_ok=True)
    seen = 0
    for slug, i in ids.items():
        _open(page, i)
        srcs = page.eval_on_selector_all(".ev img", "els => els.map(e => e.src)")
        assert srcs, f"{slug}: no evidence images"
        natural = page.eval_on_selector_all(".ev img", "els => els.map(e => e.naturalWidth)")
        assert all(w > 0 for w in natural), f"{slug}: an image did not decode in the browser"
        for src in srcs:
            r = page.request.get(src)
            assert r.status == 200, (slug, src, r.status)
            assert r.headers["content-type"] == "image/png"
            im = Image.open(io.BytesIO(r.body()))
            im.load()
            px = np.asarray(im.convert("L"), dtype=float)
            assert im.format == "PNG" and px.std() > 8, (slug, src)
            seen += 1
        page.screenshot(path=str(ARTIFACTS / f"dataset-{slug}.png"), full_page=True)
    assert seen >= 6 * len(ids)


def test_zero_filled_page_shows_spectrum_with_support(page, ids) -> None:
    """The zero-filled archive's page has the spectrum map and the profiles figures."""
    _open(page, ids["openbrain-magnitude"])
    names = page.eval_on_selector_all(".ev-fig[id^=figure-]", "els => els.map(e => e.id)")
    assert {"figure-spectrum_map", "figure-kspace_profiles", "figure-background_noise"} <= set(
        names)
    jpeg = ids["teaching-jpeg"]
    _open(page, jpeg)
    assert page.locator("#figure-block_signature img").count() == 1


def _sampling_cli(report_path: Path, family: str, r: float, dims: int, axis: str) -> float:
    res = subprocess.run([*RAWPROOF, "sampling", "--from-report", str(report_path),
                          "--family", family, "-R", str(r), "--dims", str(dims),
                          "--axis", axis, "--json"],
                         capture_output=True, text=True, timeout=120, cwd=REPO)
    assert res.returncode == 0, res.stderr
    return float(json.loads(res.stdout)["results"][0]["effective_acceleration"])


@pytest.mark.parametrize(("family", "accel", "layout", "denser_centre"),
                         [("uniform", "6", "1-cols", False), ("polynomial", "4", "1-rows", True)])
def test_calculator_equals_sampling_command(page, ids, tmp_path, family, accel,
                                            layout, denser_centre) -> None:
    """The page's R_eff equals ``rawproof sampling --from-report`` (20 masks, seed 0)
    for the same family, R and layout, to the two decimals the page shows; the JSON
    endpoint's value equals it exactly. On the half support of the zero-filled
    archive a uniform mask keeps its nominal rate (within 10 %), while a
    variable-density mask samples the support more densely (R_eff < 0.9 R):
    Lustig, Donoho and Pauly, MRM 58:1182 (2007) for variable density."""
    i = ids["openbrain-magnitude"]
    _open(page, i)
    report = page.request.get(f"/datasets/{i}/report.json")
    path = tmp_path / "report.json"
    path.write_bytes(report.body())
    dims, axis = int(layout[0]), layout[2:]
    expect = _sampling_cli(path, family, float(accel), dims, axis)
    page.select_option("form.ev-calc select[name=family]", family)
    page.fill("form.ev-calc input[name=acceleration]", accel)
    page.select_option("form.ev-calc select[name=layout]", layout)
    before = page.locator(".ev-calc-chart").get_attribute("src")
    page.click("form.ev-calc button[type=submit]")
    # the server draws the chart with 20 seeded masks per point: allow a loaded machine
    page.wait_for_function(
        "s => document.querySelector('.ev-calc-chart').getAttribute('src') !== s", arg=before,
        timeout=120_000)
    shown = page.locator(".ev-calc-value").inner_text()
    assert shown == f"R_eff = {round(expect, 2):g}" or shown == f"R_eff = {expect:.2f}".rstrip(
        "0").rstrip("."), (shown, expect)
    api = page.request.get(f"/datasets/{i}/effective-rate?family={family}&acceleration={accel}"
                           f"&layout={layout}", headers={"accept": "application/json"}).json()
    assert api["effective_acceleration"] == expect
    if denser_centre:
        assert expect < float(accel) * 0.9
    else:
        assert abs(expect - float(accel)) < 0.1 * float(accel)
    page.wait_for_function("() => document.querySelector('.ev-calc-chart').naturalWidth > 0",
                           timeout=120_000)


def test_calculator_reports_bad_input(page, ids) -> None:
    """An acceleration out of range is refused (HTTP 422, the store's ValidationError)
    with a message the page shows in its error panel, not a number."""
    i = ids["openbrain-magnitude"]
    r = page.request.get(f"/datasets/{i}/effective-rate?family=uniform&acceleration=99",
                         headers={"accept": "application/json"})
    assert r.status == 422 and "between 1 and" in r.json()["error"]["message"]


def test_methods_statement_names_present_traces_and_copies(page, ids) -> None:
    """For each page: every present trace's name is in the statement; Copy puts the
    exact statement on the clipboard."""
    for slug, i in ids.items():
        _open(page, i)
        report = page.request.get(f"/datasets/{i}/report.json").json()
        text = page.locator("#ev-methods-text").inner_text()
        present = [t for t, d in report["traces"].items() if d["status"] == "present"]
        assert present, slug
        for tid in present:
            assert TRACE_NAMES.get(tid, tid) in text, (slug, tid)
        plain = page.request.get(f"/datasets/{i}/methods.txt")
        assert plain.status == 200 and plain.text().strip() == text.strip(), slug
        # the JSON export carries the same paragraph (an added key of the contract)
        assert report["methods_statement"].strip() == text.strip(), slug
    page.click(".ev-copy")
    page.wait_for_function("() => document.querySelector('.ev-copied').textContent !== ''")
    assert page.locator(".ev-copied").inner_text() == "Copied."
    clip = page.evaluate("() => navigator.clipboard.readText()")
    assert clip == page.locator("#ev-methods-text").inner_text().strip()


def test_slice_viewer_buttons_and_keyboard(page, ids) -> None:
    """Next loads preview 1 of the image and the spectrum; ArrowRight on the slider
    moves on to preview 2."""
    _open(page, ids["openbrain-magnitude"])
    viewer = page.locator(".ev-viewer").first
    n = int(viewer.get_attribute("data-n"))
    assert n == 4  # four slices in the generated series (demo_data/generate.py)
    viewer.locator(".ev-step[data-step='1']").click()
    assert viewer.locator(".ev-slice-spectrum").get_attribute("src").endswith("/spectra/1.png")
    viewer.locator(".ev-range").focus()
    page.keyboard.press("ArrowRight")
    assert viewer.locator(".ev-slice-image").get_attribute("src").endswith("/images/2.png")
    assert "3 of 4" in viewer.locator(".ev-pos").inner_text()
    page.wait_for_function(
        "() => [...document.querySelectorAll('.ev-viewer img')].every(i => i.naturalWidth > 0)")


def test_print_stylesheet_applies(page, ids) -> None:
    """Print media hides the controls and forms, keeps figures two to a row, shows the
    caution; the printed record is at most three A4 pages."""
    i = ids["openbrain-magnitude"]
    _open(page, i)
    page.emulate_media(media="print")
    try:
        shown = page.evaluate("""() => ({
            controls: getComputedStyle(document.querySelector('.ev-controls')).display,
            copy: getComputedStyle(document.querySelector('.ev-copy')).display,
            grid: getComputedStyle(document.querySelector('.ev-grid')).gridTemplateColumns,
            caution: getComputedStyle(document.querySelector('footer.caution')).display,
        })""")
        assert shown["controls"] == "none" and shown["copy"] == "none"
        assert len(shown["grid"].split()) == 2
        assert shown["caution"] != "none"
        pdf = page.pdf(format="A4", print_background=False)
        ARTIFACTS.mkdir(exist_ok=True)
        (ARTIFACTS / "dataset-openbrain-magnitude.pdf").write_bytes(pdf)
        n_pages = len(re.findall(rb"/Type\s*/Page[^s]", pdf))
        assert 1 <= n_pages <= 3, n_pages
    finally:
        page.emulate_media(media="screen")


def test_evidence_routes_need_sign_in(demo_server, ids) -> None:
    """Figures, previews, the calculator and the methods text are for signed-in
    members only: a page request is sent to sign-in, an API request gets 401."""
    srv, _ = demo_server
    i = ids["openbrain-magnitude"]
    member = srv.login(*MEMBER)
    page_html = member.get(f"/datasets/{i}").text
    member.close()
    figure = re.search(r'src="(/datasets/\d+/reports/\d+/figures/[a-z_]+\.png)"', page_html)
    preview = re.search(r'src="(/datasets/\d+/reports/\d+/previews/[^"]+\.png)"', page_html)
    assert figure and preview
    anon = srv.client()
    for url in (figure.group(1), preview.group(1), f"/datasets/{i}/methods.txt",
                f"/datasets/{i}/effective-rate.png"):
        r = anon.get(url)
        assert r.status_code == 303 and r.headers["location"].startswith("/login"), url
    r = anon.get(f"/datasets/{i}/effective-rate", headers={"accept": "application/json"})
    assert r.status_code == 401
    anon.close()
