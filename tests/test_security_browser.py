"""Script payloads rendered inert, checked in headless Chromium against a real server.

Attacker-controlled text reaches the pages from the upload form (dataset name,
description, source, file names), from comments and decision rationales, and from
the files themselves: DICOM text elements (SeriesDescription (0008,103E), which
names the group, and DerivationDescription (0008,2111), quoted in the report's
header notes; PS3.3 C.7.3.1 and C.7.6.1) are whatever the file's author wrote.
Each payload (OWASP XSS filter-evasion examples, recalled from memory) would set
``window.__pwned`` or open a dialog if it ran. In the browser: no dialog opens,
``window.__pwned`` stays undefined, no Content-Security-Policy violation is
reported (so the markup was escaped, not merely blocked by the CSP; W3C CSP
Level 3 ``securitypolicyviolation`` event), and the payload reads as plain text.
"""

from __future__ import annotations

import io
import warnings

import pytest

from tests.server_harness import running_server, zero_filled_npy

pytestmark = [pytest.mark.browser, pytest.mark.server]

PW = {"ada": "ada-password-1", "ben": "ben-password-1"}
SCRIPT = "<script>window.__pwned=1;alert(1)</script>"
IMG = '"><img src=x onerror="window.__pwned=2;alert(2)">'
SVG = "<svg onload=window.__pwned=3>"
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
WATCH = """
window.__dialogs = [];
window.__violations = [];
document.addEventListener('securitypolicyviolation',
    e => window.__violations.push(e.violatedDirective + ' ' + e.blockedURI));
"""


def _hostile_dicom() -> bytes:
    """pydicom's bundled MR_small.dcm with script payloads in its text elements."""
    import pydicom
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("MR_small.dcm"))
    ds.SeriesDescription = SCRIPT
    ds.DerivationDescription = IMG
    ds.ImageType = ["DERIVED", "SECONDARY", "MPR"]
    ds.ProtocolName = SVG
    buf = io.BytesIO()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ds.save_as(buf, enforce_file_format=True)
    return buf.getvalue()


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("xss"), worker=True) as srv:
        srv.add_users(PW)
        yield srv


@pytest.fixture(scope="module")
def hostile(server):
    ada, ben = server.login("ada", PW["ada"]), server.login("ben", PW["ben"])
    dicom_set = ada.upload_files(SCRIPT, [(f"{IMG}.dcm", _hostile_dicom())], source=SVG,
                                 description=IMG, licence=SCRIPT)["dataset_id"]
    npy_set = ada.upload_files(IMG, [(f"{SVG}/scan.npy", zero_filled_npy(701))],
                               intended_use=SCRIPT)["dataset_id"]
    for ds in (dicom_set, npy_set):
        # the hostile names must reach a finished report, or its page is never tested
        assert ada.wait_for_job(ds, timeout=180)["state"] == "done"
        for body in (SCRIPT, IMG, SVG):
            assert ben.post_form(f"/datasets/{ds}/comments", {"body": body}).status_code == 303
    r = ben.post_form(f"/datasets/{dicom_set}/decisions", {
        "outcome": "rejected", "rationale": IMG, "expected_current_id": "0"},
        page=f"/datasets/{dicom_set}")
    assert r.status_code == 303
    report = ada.get(f"/api/datasets/{dicom_set}/report").json()
    notes = " ".join(report["header"].get("notes", []))
    assert IMG in notes  # the payload does reach the page through the header notes
    return {"dicom": dicom_set, "npy": npy_set, "report_id": report.get("id")}


def test_payloads_do_not_run_in_chromium(server, hostile) -> None:
    from playwright.sync_api import sync_playwright

    pages = ["/", f"/datasets/{hostile['dicom']}", f"/datasets/{hostile['npy']}",
             "/?q=%3Cscript%3Ewindow.__pwned%3D4%3C%2Fscript%3E", "/account"]
    seen: dict[str, str] = {}
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path="/usr/bin/chromium", args=CHROMIUM_ARGS)
        try:
            context = browser.new_context()
            context.add_init_script(WATCH)
            page = context.new_page()
            dialogs: list[str] = []
            page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            page.goto(f"{server.base_url}/login")
            page.fill("input[name=name]", "ada")
            page.fill("input[name=password]", PW["ada"])
            page.click("button[type=submit], input[type=submit]")
            page.wait_for_url(f"{server.base_url}/")
            for path in pages:
                page.goto(f"{server.base_url}{path}")
                page.wait_for_load_state("load")
                assert page.evaluate("typeof window.__pwned") == "undefined", path
                assert page.evaluate("window.__violations") == [], path
                seen[path] = page.inner_text("body")
                # the page's own scripts did run (the watch is alive), so a payload could have
                assert page.evaluate("Array.isArray(window.__dialogs)")
            assert dialogs == []
            # the detector works: the same payload in a page without escaping or CSP runs
            bare = context.new_page()
            bare.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
            bare.set_content(f"<p>{IMG}</p>")
            bare.wait_for_function("typeof window.__pwned !== 'undefined'", timeout=10_000)
            assert bare.evaluate("window.__pwned") == 2 and dialogs == ["2"]
        finally:
            browser.close()
    dataset_text = seen[f"/datasets/{hostile['dicom']}"]
    assert SCRIPT in dataset_text  # shown as text: dataset name, comments
    assert IMG in dataset_text  # description, header note, rationale, file name
    assert SVG in seen[f"/datasets/{hostile['npy']}"]
    assert SCRIPT in seen["/"] and IMG in seen["/"]
