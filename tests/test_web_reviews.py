"""Comments, decisions, conflicts, exports and audit events through the web app's routes
(in process, FastAPI's TestClient; no server process).

The rules under test come from the design (shared/DESIGN.md, "People and
rules"): the uploader cannot decide; every decision keeps its rationale and
stays in history; two reviewers deciding at once never overwrite each other.
HTML escaping follows the HTML5 serialisation of ``<`` and ``>`` as ``&lt;``
and ``&gt;`` (common practice, no source).
"""

from __future__ import annotations

import re
import threading

import pytest

from tests.server_harness import inprocess_server, zero_filled_npy

PW = {"uma": "uma-password-1", "rei": "rei-password-1", "kit": "kit-password-1",
      "ada": "ada-password-1"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with inprocess_server(tmp_path_factory.mktemp("reviews")) as srv:
        srv.add_users(PW, admins=("ada",))
        yield srv


@pytest.fixture(scope="module")
def members(server):
    return {name: server.login(name, pw) for name, pw in PW.items()}


def _new_dataset(members, seed: int, name: str) -> int:
    return members["uma"].upload_files(name, [("scan.npy", zero_filled_npy(seed))])["dataset_id"]


def _expected_id(html: str) -> str:
    return re.search(r'name="expected_current_id" value="(\d+)"', html).group(1)


def _decide(member, ds: int, outcome: str, rationale: str, expected: str, token: str):
    return member.post(f"/datasets/{ds}/decisions", data={
        "csrf_token": token, "outcome": outcome, "rationale": rationale,
        "expected_current_id": expected})


def test_uploader_cannot_decide_their_own_dataset(server, members) -> None:
    ds = _new_dataset(members, 31, "Own set")
    uma = members["uma"]
    page = uma.get(f"/datasets/{ds}").text
    assert f'action="/datasets/{ds}/decisions"' not in page
    assert "another member records its decision" in page
    r = _decide(uma, ds, "fit_for_reconstruction", "looks raw to me", "0", uma.csrf())
    assert r.status_code == 403 and "another member must record" in r.text
    api = uma.post(f"/api/datasets/{ds}/decisions", headers={"x-csrf-token": uma.csrf()},
                   json={"outcome": "rejected", "rationale": "x", "expected_current_id": 0})
    assert api.status_code == 403
    assert uma.get(f"/datasets/{ds}/decisions.json").json()["history"] == []


@pytest.mark.parametrize("round_", range(3))
def test_concurrent_decisions_never_overwrite_each_other(server, members, round_) -> None:
    """Both reviewers saw "no decision" and submit at once: one wins, one sees a conflict."""
    ds = _new_dataset(members, 40 + round_, f"Race set {round_}")
    rei, kit = members["rei"], members["kit"]
    forms = {}
    for who, client in (("rei", rei), ("kit", kit)):
        html = client.get(f"/datasets/{ds}").text
        forms[who] = (_expected_id(html), re.search(
            r'name="csrf_token" value="([^"]+)"', html).group(1))
    assert forms["rei"][0] == forms["kit"][0] == "0"
    barrier = threading.Barrier(2)
    results = {}
    choice = {"rei": ("downstream_only", "zero-filled 2x; fine for segmentation"),
              "kit": ("rejected", "magnitude only, no phase")}

    def submit(who: str, client) -> None:
        barrier.wait()
        results[who] = _decide(client, ds, *choice[who], *forms[who])

    threads = [threading.Thread(target=submit, args=(w, c)) for w, c in (("rei", rei),
                                                                          ("kit", kit))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    codes = sorted(r.status_code for r in results.values())
    assert codes == [303, 409]
    winner = next(w for w, r in results.items() if r.status_code == 303)
    loser = "kit" if winner == "rei" else "rei"
    conflict = results[loser].text
    from app.store.models import OUTCOMES

    assert "while you were reviewing" in conflict
    assert OUTCOMES[choice[winner][0]] in conflict  # the new state is shown
    assert choice[loser][1] in conflict  # the loser's typed rationale is kept
    history = rei.get(f"/datasets/{ds}/decisions.json").json()["history"]
    assert [d["reviewer"] for d in history] == [winner]
    # The loser read the new state and decides again against it: both stay in history.
    retry = _decide(members[loser], ds, *choice[loser], _expected_id(conflict),
                    forms[loser][1])
    assert retry.status_code == 303
    export = rei.get(f"/datasets/{ds}/decisions.json").json()
    assert [d["reviewer"] for d in export["history"]] == [loser, winner]
    assert export["current"]["reviewer"] == loser
    assert export["history"][0]["previous_id"] == export["history"][1]["id"]


def test_api_decision_conflict_answers_409_with_the_current_state(server, members) -> None:
    ds = _new_dataset(members, 50, "API race set")
    rei, kit = members["rei"], members["kit"]
    first = rei.post(f"/api/datasets/{ds}/decisions", headers={"x-csrf-token": rei.csrf()},
                     json={"outcome": "rejected", "rationale": "8-bit", "expected_current_id": 0})
    assert first.status_code == 201
    second = kit.post(f"/api/datasets/{ds}/decisions", headers={"x-csrf-token": kit.csrf()},
                      json={"outcome": "fit_for_reconstruction", "rationale": "raw",
                            "expected_current_id": 0})
    assert second.status_code == 409
    assert second.json()["current"]["id"] == first.json()["id"]


def test_decision_needs_an_outcome_and_a_rationale(server, members) -> None:
    ds = _new_dataset(members, 51, "Validation set")
    rei = members["rei"]
    r = _decide(rei, ds, "downstream_only", "   ", "0", rei.csrf())
    assert r.status_code == 422 and "rationale is required" in r.text
    r = _decide(rei, ds, "use_anyway", "because", "0", rei.csrf())
    assert r.status_code == 422
    assert rei.get(f"/api/datasets/{ds}/decisions").json()["history"] == []


def test_comments_are_plain_escaped_text_and_may_point_at_a_trace(server, members) -> None:
    ds = _new_dataset(members, 52, "Comment set")
    kit = members["kit"]
    body = '<img src=x onerror="alert(1)"> spectrum <b>ends</b> at half the matrix'
    r = kit.post_form(f"/datasets/{ds}/comments", {"body": body, "trace_id": "zero_filling"})
    assert r.status_code == 303
    page = kit.get(f"/datasets/{ds}").text
    assert "&lt;img src=x onerror=&#34;alert(1)&#34;&gt;" in page
    assert "<img src=x" not in page and "<b>ends</b>" not in page
    assert 'href="#trace-zero_filling"' in page
    api = kit.get(f"/api/datasets/{ds}/comments").json()["comments"]
    assert api[0]["body"] == body and api[0]["trace_id"] == "zero_filling"
    empty = kit.post_form(f"/datasets/{ds}/comments", {"body": "  "})
    assert empty.status_code == 422 and "comment is required" in empty.text
    bad_trace = kit.post_form(f"/datasets/{ds}/comments", {"body": "x", "trace_id": "../x"})
    assert bad_trace.status_code == 422


def test_registry_shows_decision_and_reviewer_and_filters(server, members) -> None:
    ds = _new_dataset(members, 53, "Registry filter set")
    rei = members["rei"]
    assert _decide(rei, ds, "fit_for_reconstruction", "complex, multi-coil", "0",
                   rei.csrf()).status_code == 303
    page = rei.get("/", params={"decision": "fit_for_reconstruction"}).text
    assert "Registry filter set" in page and "by rei" in page
    assert "Own set" not in page
    assert "Registry filter set" not in rei.get("/", params={"decision": "none"}).text
    assert "Registry filter set" in rei.get("/", params={"q": "filter SET"}).text
    assert "Registry filter set" not in rei.get("/", params={"uploader": "kit"}).text


def test_every_change_is_an_audit_event(server, members) -> None:
    ds = _new_dataset(members, 54, "Audit set")
    kit = members["kit"]
    kit.post_form(f"/datasets/{ds}/comments", {"body": "noted"})
    _decide(kit, ds, "rejected", "quantised to 8 bits", "0", kit.csrf())
    audit = members["ada"].get("/admin/audit").text
    rows = re.findall(r"<tr>\s*<td[^>]*>[^<]*</td>\s*<td>(\w+)</td>\s*<td><code>([a-z.]+)</code>"
                      r"</td>\s*<td>(?:<a href=\"/datasets/(\d+)\">)?", audit)
    mine = {(who, action) for who, action, d in rows if d == str(ds)}
    assert {("uma", "dataset.create"), ("uma", "job.queue"), ("kit", "comment.add"),
            ("kit", "decision.record")} <= mine
