"""Issue 21, Low findings 8-11, 13 and 15, replayed as sent against a real server on 127.0.0.1.

Status codes: RFC 9110 (400 15.5.1, 401 15.5.2, 403 15.5.4, 404 15.5.5, 422
15.5.21, 429 RFC 6585 section 4). Passwords: NIST SP 800-63B section 5.1.1.2
(memorized secret verifiers).
"""

from __future__ import annotations

import re

import pytest

from tests.server_harness import running_server, zero_filled_npy
from tests.test_hardening_high import PASSWORD

pytestmark = pytest.mark.server

BIG = 2**63  # one past the largest signed 64-bit row id


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("low"),
                        extra_args=["--lease-seconds", "4"]) as srv:
        srv.add_users({"ada": PASSWORD, "bea": PASSWORD, "cal": PASSWORD}, admins=("cal",))
        yield srv


@pytest.fixture(scope="module")
def analysed(server) -> int:
    """A dataset uploaded by ada and analysed by the server's worker."""
    ada = server.login("ada", PASSWORD)
    ds = ada.upload_files("low findings", [("scan.npy", zero_filled_npy(21))])["dataset_id"]
    assert ada.wait_for_job(ds)["state"] == "done"
    return ds


def _error(r) -> dict:
    assert r.headers["content-type"].startswith("application/json"), r.text[:200]
    return r.json()["error"]


def test_finding_8_malformed_numbers_answer_422_naming_the_field(server, analysed) -> None:
    """Finding 8: ``expected_current_id`` of "abc", [1] or Infinity, a comment
    ``trace_id`` that is a number or a list, and ids at 2^63 in four routes.

    Each answers 422 (RFC 9110 15.5.21) with the JSON error object naming the
    field, never 500; nothing is stored.
    """
    bea = server.login("bea", PASSWORD)
    h = {"x-csrf-token": bea.csrf(), "content-type": "application/json"}
    for raw in ('"abc"', "[1]", "Infinity", str(BIG)):
        body = '{"outcome": "rejected", "rationale": "r", "expected_current_id": ' + raw + "}"
        r = bea.post(f"/api/datasets/{analysed}/decisions", content=body, headers=h)
        assert r.status_code == 422, (raw, r.status_code, r.text[:200])
        assert "expected_current_id" in _error(r)["message"]
    for raw in ("5", "[1]"):
        r = bea.post(f"/api/datasets/{analysed}/comments", headers=h,
                     content='{"body": "hello", "trace_id": ' + raw + "}")
        assert r.status_code == 422, (raw, r.status_code, r.text[:200])
        assert "trace_id" in _error(r)["message"]
    for path, field in ((f"/datasets/{BIG}", "dataset_id"),
                        (f"/datasets/{BIG}/status", "dataset_id"),
                        (f"/files/{BIG}/download", "link_id"),
                        (f"/api/datasets/{BIG}", "dataset_id")):
        r = bea.get(path, headers={"accept": "application/json"})
        assert r.status_code == 422, (path, r.status_code, r.text[:200])
        err = _error(r)
        assert err["code"] == "invalid_request" and field in err["message"], err
    # the page form: a malformed expected_current_id is refused, not read as "none seen"
    r = bea.post(f"/datasets/{analysed}/decisions",
                 data={"csrf_token": bea.csrf(), "outcome": "rejected", "rationale": "r",
                       "expected_current_id": "abc"})
    assert r.status_code == 422 and "expected_current_id" in r.text
    assert bea.get(f"/api/datasets/{analysed}/decisions").json()["history"] == []
    assert bea.get(f"/api/datasets/{analysed}/comments").json()["comments"] == []


def test_finding_9_report_history_link_downloads_the_report(server, analysed) -> None:
    """Finding 9: every report-history link answered 422. Followed from the page,
    the link now gives the stored report as a JSON attachment."""
    bea = server.login("bea", PASSWORD)
    bea.post_form(f"/datasets/{analysed}/reanalyse", {})
    job = bea.wait_for_job(analysed)
    assert job["state"] == "done"
    page = bea.get(f"/datasets/{analysed}").text
    links = re.findall(rf'href="(/datasets/{analysed}/reports/\d+\.json)"', page)
    assert len(links) == 2, links  # one per report in the history
    for link in links:
        r = bea.get(link)
        assert r.status_code == 200, (link, r.status_code, r.text[:200])
        assert "attachment" in r.headers["content-disposition"]
        assert r.json()["schema"].startswith("rawproof.report/")
    report_id = int(links[0].rsplit("/", 1)[1].split(".")[0])
    assert bea.get(f"/datasets/{analysed}/reports/{report_id}").status_code == 200
