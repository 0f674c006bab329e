"""The bias probe from the dataset page, and issue 22's small things (in process,
FastAPI's TestClient; analyses and probes run inline as the worker runs them).

Outside references: the probe's numbers are ``app.probe``'s (checked against
scikit-image and closed forms in tests/test_probe.py); here the page, the methods
statement and the registry must quote the stored ``rawproof.probe/1`` object
exactly. Truth of the files (tests/server_harness.zero_filled_npy): zero-filled 2x
magnitude images, for which Shimron, Tamir, Wang and Lustig (PNAS 2022) report
that naive use flatters reconstructions by tens of percent (a positive gap).
"""

from __future__ import annotations

import json
import subprocess

import pytest

from tests.server_harness import RAWPROOF, inprocess_server, zero_filled_npy


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with inprocess_server(tmp_path_factory.mktemp("probe")) as srv:
        srv.add_users({"uma": "uma-password-1", "rei": "rei-password-1"}, admins=("rei",))
        yield srv


def test_probe_from_the_page_is_stored_quoted_and_sortable(server) -> None:
    from app import probe_jobs
    from app.worker import run_inline

    uma = server.login("uma", "uma-password-1")
    ds = uma.upload_files("Probe set", [("scan.npy", zero_filled_npy(61))])["dataset_id"]
    other = uma.upload_files("Unprobed", [("b.npy", zero_filled_npy(62))])["dataset_id"]
    r = uma.post_form(f"/datasets/{ds}/probe", {"acceleration": "4", "family": "polynomial",
                                                "slices": "2"}, page=f"/datasets/{ds}")
    assert r.status_code == 422 and "wait for the analysis report" in r.text
    assert run_inline(server.settings) == 2
    r = uma.post_form(f"/datasets/{ds}/probe", {"acceleration": "4", "family": "polynomial",
                                                "slices": "2"}, page=f"/datasets/{ds}")
    assert r.status_code in (200, 303)
    status = uma.get(f"/datasets/{ds}/status").json()
    assert status["probe"]["state"] == "queued"
    again = uma.post_form(f"/datasets/{ds}/probe", {"acceleration": "4", "slices": "2"},
                          page=f"/datasets/{ds}")
    assert "already queued or running" in again.text
    assert probe_jobs.run_pending(server.settings) == 1
    run = uma.get(f"/datasets/{ds}/status").json()["probe"]
    assert run["state"] == "done", run
    result = run["result"]
    assert result["schema"] == "rawproof.probe/1" and result["slices"] == 2
    gap = result["gap"]["nrmse"]
    assert gap > 0  # naive use flatters zero-filled magnitude data

    page = uma.get(f"/datasets/{ds}").text
    assert f'{result["routes"]["as_delivered"]["nrmse"]:.3f}' in page
    assert f"naive use flatters the NRMSE by {100 * gap:.0f} %" in page
    methods = uma.get(f"/datasets/{ds}/methods.txt").text
    assert "bias probe" in methods and f"{100 * gap:.0f} %" in methods

    rows = uma.get("/api/datasets", params={"sort": "gap"}).json()["datasets"]
    assert [d["id"] for d in rows][:2] == [ds, other]  # probed first, then never probed
    assert rows[0]["probe_gap"] == pytest.approx(gap)
    assert "probe gap" in uma.get("/").text


def test_withdraw_edit_and_duplicates_on_the_page(server) -> None:
    """Issue 22 item 6: a corrected licence keeps its old value in the shown history;
    a withdrawn set leaves the default registry; the duplicate notice lists the other
    dataset (never the dataset itself) with its decision; an admin purge needs the name."""
    from app.worker import run_inline

    uma = server.login("uma", "uma-password-1")
    rei = server.login("rei", "rei-password-1")
    content = zero_filled_npy(63)
    first = uma.upload_files("Original copy", [("a.npy", content), ("a2.npy", content)])
    second = uma.upload_files("Second copy", [("b.npy", content)])["dataset_id"]
    first = first["dataset_id"]
    run_inline(server.settings)
    rei.post_form(f"/datasets/{first}/decisions", {"outcome": "rejected", "rationale": "junk",
                                                   "expected_current_id": "0"},
                  page=f"/datasets/{first}")
    page = uma.get(f"/datasets/{second}").text
    notice = page[page.index('id="duplicates"'):page.index("</section>", page.index(
        'id="duplicates"'))]
    assert "Original copy" in notice and "Rejected" in notice and "Second copy" not in notice
    own = uma.get(f"/datasets/{first}").text
    dup = own[own.index('id="duplicates"'):own.index("</section>", own.index('id="duplicates"'))]
    assert "Original copy" not in dup  # two names for one content are not a duplicate

    uma.post_form(f"/datasets/{second}/edit", {"name": "Second copy", "source": "https://x.org",
                                               "licence": "CC0", "description": "",
                                               "intended_use": ""}, page=f"/datasets/{second}")
    page = uma.get(f"/datasets/{second}").text
    assert "Change history (1)" in page and "<ins>CC0</ins>" in page
    rei_edit = rei.post_form(f"/datasets/{second}/edit", {"name": "Taken over",
                                                          "source": "y"},
                             page=f"/datasets/{second}")
    assert rei_edit.status_code in (200, 303)  # rei is an admin: allowed
    uma.post_form(f"/datasets/{second}/withdraw", {"reason": "a duplicate of Original copy"},
                  page=f"/datasets/{second}")
    assert "Taken over" not in uma.get("/").text
    assert "Taken over" in uma.get("/", params={"withdrawn": "1"}).text
    bad = rei.post_form(f"/datasets/{second}/purge", {"confirm_name": "wrong"},
                        page=f"/datasets/{second}")
    assert "name exactly to confirm the purge" in bad.text
    ok = rei.post_form(f"/datasets/{second}/purge", {"confirm_name": "Taken over"},
                       page=f"/datasets/{second}")
    assert ok.status_code in (200, 303)
    assert "files were purged" in uma.get(f"/datasets/{second}").text
    # the bytes are still held by the first dataset, so they stay in the store
    assert uma.get(f"/datasets/{first}").status_code == 200


@pytest.mark.slow
def test_analyse_json_to_a_file_prints_no_report(tmp_path) -> None:
    """Issue 22 item 7: ``analyse --json -o FILE`` writes the report to FILE only."""
    scan = tmp_path / "s.npy"
    scan.write_bytes(zero_filled_npy(64))
    out = tmp_path / "r.json"
    p = subprocess.run([*RAWPROOF, "analyse", str(scan), "--json", "-o", str(out), "--quiet"],
                       capture_output=True, text=True, check=True)
    assert p.stdout == ""
    assert json.loads(out.read_text())["schema"] == "rawproof.report/1"
    summary = subprocess.run([*RAWPROOF, "analyse", str(scan), "--quiet"], capture_output=True,
                             text=True, check=True).stdout
    from app.methods import plain_answer, usual_effective

    report = json.loads(out.read_text())
    assert plain_answer(report, effective=usual_effective(report))["text"] in summary


@pytest.mark.slow
def test_users_add_without_a_terminal_says_what_to_do(tmp_path) -> None:
    """Issue 22 item 7: no terminal and no --password: a message and exit code 2."""
    p = subprocess.run([*RAWPROOF, "users", "add", "zed", "--data", str(tmp_path)],
                       capture_output=True, text=True, stdin=subprocess.DEVNULL)
    assert p.returncode == 2
    assert "--password" in p.stderr and "Traceback" not in p.stderr
