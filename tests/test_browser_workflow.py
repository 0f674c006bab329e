"""The whole lab workflow in headless Chromium against a real server.

Sign in, register a small dataset through the upload page, wait for the
analysis to appear, comment, sign in as a second member, decide, and find the
decision in the registry. The page must raise no Content-Security-Policy
violation (W3C CSP Level 3: the browser reports blocked inline script or
style on the console). Screenshots go to ``test-artifacts/``.

The dataset's truth (from ``demo_data.synth``): 4 coils at 32 x 32,
zero-filled 2x, root-sum-of-squares combined; the test checks only that the
report the worker stored is the one the page shows (its trace table), not
the analysers' accuracy, which their own tests check.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from tests.server_harness import REPO, running_server, zero_filled_npy

pytestmark = [pytest.mark.browser, pytest.mark.server]

CHROMIUM = "/usr/bin/chromium"
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--disable-sync", "--no-first-run"]
ARTIFACTS = REPO / "test-artifacts"
PW = {"uma": "uma-password-1", "rei": "rei-password-1"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("browser")) as srv:
        srv.add_users(PW)
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


def test_upload_analyse_comment_decide_and_find_it_in_the_registry(server, browser, tmp_path):
    ARTIFACTS.mkdir(exist_ok=True)
    base = server.base_url
    scan = tmp_path / "knee_scan.npy"
    scan.write_bytes(zero_filled_npy(81))
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    page = context.new_page()
    violations: list[str] = []
    page.on("console", lambda msg: violations.append(msg.text)
            if msg.type == "error" and "Content Security Policy" in msg.text else None)

    _sign_in(page, base, "uma")
    assert page.locator("text=No datasets yet").is_visible()
    page.screenshot(path=str(ARTIFACTS / "browser-01-empty-registry.png"), full_page=True)

    page.click("text=Register a dataset >> nth=0")
    page.fill("#f-name", "Harbourview knee archive")
    page.fill("#f-source", "https://data.example.org/harbourview/knee")
    page.fill("#f-licence", "CC BY 4.0")
    page.fill("#f-description", "Magnitude images from an invented public archive.")
    page.fill("#f-use", "Training an undersampled reconstruction network")
    page.set_input_files("#f-files", str(scan))
    assert "1 file" in page.inner_text("#file-summary")
    page.screenshot(path=str(ARTIFACTS / "browser-02-upload-form.png"), full_page=True)
    page.click("#upload-submit")
    page.wait_for_url(f"{base}/datasets/*")
    dataset_url = page.url

    # The page polls the job and, when the report is stored, offers a link to it
    # (it never reloads itself: issue 22, typed text is kept).
    page.wait_for_selector("#report-ready a", timeout=150_000)
    page.click("#report-ready a")
    page.wait_for_selector("table.traces")
    assert page.locator("#trace-zero_filling").count() == 1
    assert "research aid, not a medical device" in page.inner_text("footer")
    page.screenshot(path=str(ARTIFACTS / "browser-03-report.png"), full_page=True)
    assert page.locator("form.decision-form").count() == 0  # the uploader cannot decide

    page.fill("#comment-body", "The spectrum looks empty beyond half the matrix.")
    page.select_option("#comment-trace", "zero_filling")
    page.click("form.comment-form button[type=submit]")
    page.wait_for_selector("ol.comments li")
    assert "empty beyond half" in page.inner_text("ol.comments")

    page.click("text=Sign out")
    page.wait_for_url(f"{base}/login")
    _sign_in(page, base, "rei")
    page.goto(dataset_url)
    page.check("input[name=outcome][value=downstream_only]")
    page.fill("#rationale", "Zero-filled 2x magnitude images: not raw k-space; "
                            "fine for segmentation only.")
    page.click("form.decision-form button[type=submit]")
    page.wait_for_selector(".current-decision")
    assert "Fit for downstream tasks only" in page.inner_text(".current-decision")
    page.screenshot(path=str(ARTIFACTS / "browser-04-decided.png"), full_page=True)

    page.goto(f"{base}/?decision=downstream_only")
    row = page.locator("table.registry tbody tr", has_text="Harbourview knee archive")
    assert row.count() == 1
    assert "Fit for downstream tasks only" in row.inner_text() and "by rei" in row.inner_text()
    page.screenshot(path=str(ARTIFACTS / "browser-05-registry.png"), full_page=True)
    context.close()
    assert violations == []


def test_folder_picker_keeps_the_relative_names(server, browser, tmp_path):
    """The folder picker (``webkitdirectory``) sends each file's path inside the folder."""
    folder = tmp_path / "series_a"
    (folder / "echo1").mkdir(parents=True)
    (folder / "echo1" / "slices.npy").write_bytes(zero_filled_npy(82))
    (folder / "readme.txt").write_text("invented acquisition notes\n")
    context = browser.new_context()
    page = context.new_page()
    _sign_in(page, server.base_url, "rei")
    page.goto(f"{server.base_url}/upload")
    page.fill("#f-name", "Folder picked set")
    page.fill("#f-source", "lab share (invented)")
    page.set_input_files("#f-folder", str(folder))
    assert "2 files" in page.inner_text("#file-summary")
    page.click("#upload-submit")
    page.wait_for_url(f"{server.base_url}/datasets/*")
    names = page.locator("table.files-table tbody td:first-child").all_inner_texts()
    assert sorted(names) == ["series_a/echo1/slices.npy", "series_a/readme.txt"]
    context.close()
