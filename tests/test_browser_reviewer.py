"""The reviewer's day in headless Chromium against a real server (issue 22).

1. Nothing typed is lost: a second member opens a dataset whose analysis is held
   at the worker's test gate, types a comment and a decision rationale, the gate
   opens, the job finishes; the page offers a link to the report instead of
   reloading, and both texts are still in their boxes.
2. Nothing leaves the viewport: at 420 and 1366 CSS pixels wide, the registry and
   the dataset page (with its verdict panel, trace table, probe panel and forms)
   have no element whose box reaches past the viewport's right edge, and the
   document does not scroll sideways. Reference: the CSSOM View module's
   ``Element.getBoundingClientRect`` and ``scrollWidth`` (W3C), read through the
   browser; WCAG 2.1 success criterion 1.4.10 (reflow at 320 CSS px) is the
   accessibility rule behind it.

Truth of the file (``tests.server_harness.zero_filled_npy``): 4 coils at 32 x 32,
zero-filled 2x, root-sum-of-squares combined, so the report says ``processed`` and
the verdict panel names zero-filling. Screenshots go to ``test-artifacts/``.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from app.worker import GATE_ENV
from tests.server_harness import REPO, running_server, zero_filled_npy

pytestmark = [pytest.mark.browser, pytest.mark.server]

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
ARTIFACTS = REPO / "test-artifacts"
PW = {"ida": "ida-password-1", "kai": "kai-password-1"}

# Elements whose right edge passes the viewport, ignoring invisible ones and content
# inside a container that scrolls on purpose (none is expected on these pages).
OVERFLOW_JS = """
() => {
  const vw = document.documentElement.clientWidth;
  const out = [];
  for (const el of document.querySelectorAll('body *')) {
    const r = el.getBoundingClientRect();
    if (r.width === 0 || r.height === 0) continue;
    const st = getComputedStyle(el);
    if (st.visibility === 'hidden' || st.display === 'none') continue;
    // the skip link waits off-screen until focused (a common accessibility pattern)
    if (el.classList.contains('skip') && r.right <= 0) continue;
    if (r.right > vw + 1 || r.left < -1) {
      const cls = typeof el.className === 'string' ? el.className.split(' ')[0] : '';
      out.push(el.tagName.toLowerCase() + (el.id ? '#' + el.id : '') +
               (cls ? '.' + cls : '') + ' right=' + Math.round(r.right) + ' vw=' + vw);
    }
  }
  return {items: out.slice(0, 12), scroll: document.documentElement.scrollWidth, vw: vw};
}
"""


@pytest.fixture(scope="module")
def gate(tmp_path_factory) -> Path:
    return tmp_path_factory.mktemp("gate") / "open"


@pytest.fixture(scope="module")
def server(tmp_path_factory, gate):
    with running_server(tmp_path_factory.mktemp("reviewer"), env={GATE_ENV: str(gate)}) as srv:
        srv.add_users(PW, admins=("ida",))
        yield srv


@pytest.fixture(scope="module")
def browser():
    if not Path(CHROMIUM).exists() and shutil.which("chromium") is None:
        pytest.skip("Debian's chromium is not installed (apt-get install chromium)")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=ARGS)
        yield b
        b.close()


def _sign_in(page, base: str, name: str) -> None:
    page.goto(f"{base}/login")
    page.fill("#name", name)
    page.fill("#password", PW[name])
    page.click("button[type=submit]")
    page.wait_for_url(f"{base}/")


@pytest.fixture(scope="module")
def dataset_id(server, gate) -> int:
    ida = server.login("ida", PW["ida"])
    return ida.upload_files("Typed text set", [("scan.npy", zero_filled_npy(91))])["dataset_id"]


def test_typed_text_survives_the_end_of_the_analysis(server, browser, gate, dataset_id):
    ARTIFACTS.mkdir(exist_ok=True)
    base = server.base_url
    context = browser.new_context(viewport={"width": 1366, "height": 900})
    page = context.new_page()
    _sign_in(page, base, "kai")
    page.goto(f"{base}/datasets/{dataset_id}")
    assert page.locator("#analysis").get_attribute("data-state") in ("queued", "running")
    comment = "Spectrum looks empty past half the matrix; checking the source paper."
    rationale = "Zero-filled magnitude images: downstream tasks only, report R_eff."
    page.fill("#comment-body", comment)
    page.check("input[name=outcome][value=downstream_only]")
    page.fill("#rationale", rationale)
    gate.write_text("open")  # the worker may now run the job
    page.wait_for_selector("#report-ready a", timeout=150_000)
    page.screenshot(path=str(ARTIFACTS / "reviewer-01-report-ready-notice.png"), full_page=False)
    assert page.input_value("#comment-body") == comment
    assert page.input_value("#rationale") == rationale
    assert page.is_checked("input[name=outcome][value=downstream_only]")
    page.click("#report-ready a")
    page.wait_for_selector("#answer .answer-findings")
    answer = page.inner_text("#answer")
    assert "Zero-filling" in answer and "not measured k-space" in answer
    assert "research aid, not a medical device" in answer
    # what the confidence means, stated as DEVELOPERS.md "Validation discipline" has it
    assert "estimated probability that this finding is right" in answer
    assert "calibration map fitted on simulated development data" in answer
    page.screenshot(path=str(ARTIFACTS / "reviewer-02-verdict-panel-1366.png"), full_page=False)
    context.close()


@pytest.mark.parametrize("width", [420, 1366])
def test_nothing_leaves_the_viewport(server, browser, gate, dataset_id, width):
    gate.write_text("open")
    member = server.login("ida", PW["ida"])
    member.wait_for_job(dataset_id)
    base = server.base_url
    context = browser.new_context(viewport={"width": width, "height": 900})
    page = context.new_page()
    _sign_in(page, base, "ida")
    for name, url in (("registry", f"{base}/"), ("dataset", f"{base}/datasets/{dataset_id}"),
                      ("api-docs", f"{base}/api/docs")):
        page.goto(url)
        page.wait_for_load_state("load")
        for d in page.locator("details").all():  # open every fold: its forms must fit too
            d.evaluate("e => e.open = true")
        res = page.evaluate(OVERFLOW_JS)
        page.screenshot(path=str(ARTIFACTS / f"reviewer-viewport-{name}-{width}.png"),
                        full_page=True)
        assert res["items"] == [], (name, width, res)
        assert res["scroll"] <= res["vw"], (name, width, res)
    context.close()
