"""The JSON API driven through its published OpenAPI document (in process, FastAPI's
TestClient; analyses and probes run inline).

Outside references: the OpenAPI 3.1 document the server publishes is the contract
the test reads every path and request body from; answers are validated against
its component schemas with the ``jsonschema`` package (JSON Schema draft 2020-12,
which OpenAPI 3.1 schemas are). The worked example of the README (token, upload,
poll, report, comment, decide) is the sequence followed here.
"""

from __future__ import annotations

import re

import jsonschema
import pytest

from tests.server_harness import inprocess_server, zero_filled_npy

SNAKE = re.compile(r"^[a-z][a-z0-9_]*$")


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with inprocess_server(tmp_path_factory.mktemp("api")) as srv:
        srv.add_users({"ada": "ada-password-1", "ben": "ben-password-1"}, admins=("ada",))
        yield srv


def _token(server, name: str) -> str:
    from app.store import service
    from app.store.db import session_scope

    with session_scope(server.settings) as s:
        _, tok = service.create_api_token(s, service.get_user(s, name), "test")
    return tok


def _api(server, name: str):
    c = server.client()
    c.headers["authorization"] = f"Bearer {_token(server, name)}"
    return c


class Schema:
    """Paths, bodies and answers as the published document states them."""

    def __init__(self, doc: dict) -> None:
        self.doc = doc

    def op(self, method: str, path: str) -> dict:
        return self.doc["paths"][path][method.lower()]

    def check(self, method: str, path: str, status: int, body: dict) -> None:
        """``body`` matches the schema the document gives for this answer."""
        resp = self.op(method, path)["responses"][str(status)]
        schema = resp["content"]["application/json"]["schema"]
        jsonschema.validate(body, {**schema, "components": self.doc["components"]},
                            cls=jsonschema.Draft202012Validator)

    def example_body(self, method: str, path: str) -> dict:
        """The request body's required fields, with values built from their schema."""
        ref = self.op(method, path)["requestBody"]["content"]["application/json"]["schema"]
        model = self.doc["components"]["schemas"][ref["$ref"].rsplit("/", 1)[-1]]
        return {k: model["properties"][k] for k in model.get("required", [])}


def test_docs_need_sign_in_and_describe_every_call(server) -> None:
    """``/api/openapi.json`` and ``/api/docs`` answer 401 (one error shape) without a
    token; with one, the document lists the calls of the README's worked example, each
    request body is a named model, and the docs page names every path."""
    anon = server.client()
    r = anon.get("/api/openapi.json")
    assert r.status_code == 401
    assert r.json() == {"error": {"code": "not_signed_in", "message": r.json()["error"]
                                  ["message"]}}
    ada = _api(server, "ada")
    doc = ada.get("/api/openapi.json").json()
    assert doc["openapi"].startswith("3.")
    for path, method in (("/api/uploads", "post"), ("/api/datasets/{dataset_id}", "get"),
                         ("/api/datasets/{dataset_id}/report", "get"),
                         ("/api/datasets/{dataset_id}/comments", "post"),
                         ("/api/datasets/{dataset_id}/decisions", "post"),
                         ("/api/datasets/{dataset_id}/probe", "post"),
                         ("/api/datasets/{dataset_id}", "patch"),
                         ("/api/datasets/{dataset_id}/withdraw", "post")):
        assert method in doc["paths"][path], (path, method)
    body = doc["paths"]["/api/datasets/{dataset_id}/decisions"]["post"]["requestBody"]
    ref = body["content"]["application/json"]["schema"]["$ref"]
    outcome = doc["components"]["schemas"][ref.rsplit("/", 1)[-1]]["properties"]["outcome"]
    assert sorted(outcome["enum"]) == ["downstream_only", "fit_for_reconstruction", "rejected"]
    page = ada.get("/api/docs")
    assert page.status_code == 200
    for path in doc["paths"]:
        assert path in page.text
    assert "research aid, not a medical device" in page.text


def test_worked_example_through_the_schema(server) -> None:
    """Token, upload, poll, fetch the report, comment, decide, as the README shows;
    each answer validates against the published schema. Errors keep one shape with
    snake_case codes: an unknown dataset (not_found), a malformed body
    (invalid_request), the uploader deciding (self_decision), a stale decision
    (decision_conflict), a wrong outcome name (invalid_request; the enum names them).

    Truth of the file (tests/server_harness.zero_filled_npy): zero-filled 2x and
    root-sum-of-squares combined, so the report's verdict is ``processed``.
    """
    from app.worker import run_inline

    ada, ben = _api(server, "ada"), _api(server, "ben")
    sch = Schema(ada.get("/api/openapi.json").json())
    r = ada.post("/api/uploads", data={"name": "API set", "source": "https://example.org/x"},
                 files=[("files", ("scan.npy", zero_filled_npy(77), "application/octet-stream"))])
    assert r.status_code == 201, r.text
    sch.check("post", "/api/uploads", 201, r.json())
    ds = r.json()["dataset_id"]
    got = ada.get(f"/api/datasets/{ds}").json()
    sch.check("get", "/api/datasets/{dataset_id}", 200, got)
    assert got["job"]["state"] == "queued"
    assert run_inline(server.settings) == 1
    got = ada.get(f"/api/datasets/{ds}").json()
    assert got["job"]["state"] == "done" and got["verdict"] == "processed"
    report = ada.get(f"/api/datasets/{ds}/report").json()
    assert report["schema"] == "rawproof.report/1" and report["methods_statement"]

    body = sch.example_body("post", "/api/datasets/{dataset_id}/comments")
    assert list(body) == ["body"]
    r = ada.post(f"/api/datasets/{ds}/comments", json={"body": "Zero-filled 2x, as the "
                                                       "source says.", "trace_id": "zero_filling"})
    assert r.status_code == 201
    sch.check("post", "/api/datasets/{dataset_id}/comments", 201, r.json())
    comments = ada.get(f"/api/datasets/{ds}/comments").json()
    sch.check("get", "/api/datasets/{dataset_id}/comments", 200, comments)

    errors = [
        ada.get("/api/datasets/999999"),
        ada.post(f"/api/datasets/{ds}/comments", json={"text": "wrong key"}),
        ada.post(f"/api/datasets/{ds}/decisions", json={"outcome": "rejected",
                                                        "rationale": "own set"}),
        ben.post(f"/api/datasets/{ds}/decisions", json={"outcome": "maybe", "rationale": "x"}),
    ]
    codes = [e.json()["error"]["code"] for e in errors]
    assert [e.status_code for e in errors] == [404, 422, 403, 422]
    assert codes == ["not_found", "invalid_request", "self_decision", "invalid_request"]
    for e in errors:
        assert set(e.json()) == {"error"} and SNAKE.match(e.json()["error"]["code"])
        sch.check("get", "/api/datasets/{dataset_id}", e.status_code, e.json())

    r = ben.post(f"/api/datasets/{ds}/decisions", json={
        "outcome": "downstream_only", "rationale": "Zero-filled; report R_eff.",
        "expected_current_id": 0})
    assert r.status_code == 201
    sch.check("post", "/api/datasets/{dataset_id}/decisions", 201, r.json())
    stale = ben.post(f"/api/datasets/{ds}/decisions", json={
        "outcome": "rejected", "rationale": "changed my mind", "expected_current_id": 0})
    assert stale.status_code == 409
    assert stale.json()["error"]["code"] == "decision_conflict"
    assert stale.json()["current"]["outcome"] == "downstream_only"
    hist = ada.get(f"/api/datasets/{ds}/decisions").json()
    sch.check("get", "/api/datasets/{dataset_id}/decisions", 200, hist)


def test_edit_and_withdraw_through_the_api(server) -> None:
    """The uploader corrects the licence (the old value stays in the audit trail) and
    withdraws the set: it leaves the default list and comes back with
    ``withdrawn=true``."""
    ada, ben = _api(server, "ada"), _api(server, "ben")
    sch = Schema(ada.get("/api/openapi.json").json())
    ds = ben.post("/api/uploads", data={"name": "Edit me", "source": "somewhere"},
                  files=[("files", ("e.npy", zero_filled_npy(78), "application/octet-stream"))]
                  ).json()["dataset_id"]
    r = ben.patch(f"/api/datasets/{ds}", json={"licence": "CC BY 4.0"})
    assert r.status_code == 200 and r.json()["licence"] == "CC BY 4.0"
    sch.check("patch", "/api/datasets/{dataset_id}", 200, r.json())
    other = _api(server, "ada")
    r = ben.post(f"/api/datasets/{ds}/withdraw", json={"reason": "duplicate of another"})
    assert r.status_code == 200 and r.json()["withdrawn_at"]
    assert ds not in [d["id"] for d in other.get("/api/datasets").json()["datasets"]]
    listed = other.get("/api/datasets", params={"withdrawn": "true"}).json()["datasets"]
    assert [d["withdrawn"] for d in listed if d["id"] == ds] == [True]
    from app.store import service
    from app.store.db import session_scope

    with session_scope(server.settings) as s:
        events = service.edit_history(s, ds)
        assert [e.action for e in events] == ["dataset.withdraw", "dataset.edit"]
        assert events[1].detail["changes"]["licence"] == ["", "CC BY 4.0"]
