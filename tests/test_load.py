"""Load: 20 members at once sign in, browse, comment and decide while the worker analyses.

Bounded: 20 client threads on 127.0.0.1, each stopping by itself after
``RAWPROOF_LOAD_SECONDS`` (default 20 s; ``.ci/run`` gives 10 s) or 5000 requests.
Marked ``load``, which the default run leaves out (pyproject addopts). The full
minute::

    RAWPROOF_LOAD_SECONDS=60 .venv/bin/python -m pytest -m load -s

What is checked: no 5xx and no failed connection; every comment the server
acknowledged (303) is stored exactly once and nothing else was stored; every
decision acknowledged is in the dataset's history exactly once, every refused one
(409, a stale form: the review rule of DESIGN.md) is absent; the datasets uploaded
before and during the run are analysed. Latency percentiles (nearest-rank
definition, common practice, no source) are printed, not asserted.
"""

from __future__ import annotations

import collections
import io
import os
import re
import threading
import time

import numpy as np
import pytest

from tests.server_harness import running_server, zero_filled_npy

pytestmark = [pytest.mark.server, pytest.mark.load]

N_CLIENTS = 20
SECONDS = float(os.environ.get("RAWPROOF_LOAD_SECONDS", "20"))
MAX_REQUESTS = 5000
OUTCOMES = ("fit_for_reconstruction", "downstream_only", "rejected")
_EXPECTED_RE = re.compile(r'name="expected_current_id" value="(\d*)"')


def _npy(seed: int) -> bytes:
    """Truth (demo_data.synth.zero_filled_magnitude): 4 coils at 48 x 48 zero-filled 2x,
    root-sum-of-squares, 3 slices, uint16 (keeps the worker busy during the run)."""
    from demo_data import synth

    mag, _ = synth.zero_filled_magnitude((48, 48), (2.0, 2.0), n_coils=4, n_slices=3, seed=seed)
    buf = io.BytesIO()
    np.save(buf, np.round(mag / mag.max() * 4000).astype(np.uint16))
    return buf.getvalue()


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("load"), worker=True) as srv:
        srv.add_users({f"m{i:02d}": f"member-password-{i:02d}" for i in range(N_CLIENTS)}
                      | {"up": "uploader-password"})
        yield srv


def _percentile(values: list[float], q: float) -> float:
    """Nearest-rank percentile."""
    s = sorted(values)
    return s[max(0, min(len(s) - 1, int(np.ceil(q / 100 * len(s))) - 1))]


def test_twenty_members_for_the_load_period(server) -> None:
    up = server.login("up", "uploader-password")
    datasets = [up.upload_files(f"Load set {k}", [("scan.npy", _npy(400 + k))]
                                )["dataset_id"] for k in range(4)]
    lock = threading.Lock()
    latencies: dict[str, list[float]] = collections.defaultdict(list)
    statuses: collections.Counter[int] = collections.Counter()
    by_kind: collections.Counter[tuple[str, int]] = collections.Counter()
    errors: list[str] = []
    comments_ok: set[str] = set()
    comments_other: dict[str, int] = {}
    decisions_ok: list[tuple[int, str]] = []
    decisions_refused: list[tuple[int, str]] = []
    uploaded: list[int] = []
    start_barrier = threading.Barrier(N_CLIENTS)

    def timed(client, kind: str, method: str, url: str, **kw):
        t0 = time.perf_counter()
        r = client.request(method, url, **kw)
        dt = time.perf_counter() - t0
        with lock:
            latencies[kind].append(dt)
            statuses[r.status_code] += 1
            by_kind[(kind, r.status_code)] += 1
        return r

    def member(i: int) -> None:
        name = f"m{i:02d}"
        try:
            start_barrier.wait(timeout=120)
            t0 = time.perf_counter()
            c = server.login(name, f"member-password-{i:02d}")
            with lock:
                latencies["sign-in"].append(time.perf_counter() - t0)
            token = c.csrf()
            stop_at = time.monotonic() + SECONDS
            k = 0
            n = 0
            while time.monotonic() < stop_at and n < MAX_REQUESTS:
                ds = datasets[(i + k) % len(datasets)]
                timed(c, "registry", "GET", "/")
                page = timed(c, "dataset page", "GET", f"/datasets/{ds}")
                timed(c, "status json", "GET", f"/datasets/{ds}/status")
                body = f"{name} note {k}"
                r = timed(c, "comment", "POST", f"/datasets/{ds}/comments",
                          data={"body": body, "csrf_token": token})
                with lock:
                    if r.status_code == 303:
                        comments_ok.add(body)
                    else:
                        comments_other[body] = r.status_code
                n += 4
                if k % 5 == 2:
                    m = _EXPECTED_RE.search(page.text)
                    rationale = f"{name} decision {k}"
                    r = timed(c, "decision", "POST", f"/datasets/{ds}/decisions", data={
                        "outcome": OUTCOMES[(i + k) % 3], "rationale": rationale,
                        "expected_current_id": m.group(1) if m else "0",
                        "csrf_token": token})
                    n += 1
                    with lock:
                        (decisions_ok if r.status_code == 303 else decisions_refused).append(
                            (ds, rationale))
                        if r.status_code not in (303, 409):
                            errors.append(f"decision answered {r.status_code}")
                if i == 0 and k % 20 == 10 and len(uploaded) < 3:
                    info = c.upload_files(f"Uploaded under load {k}",
                                          [("scan.npy", zero_filled_npy(500 + k))])
                    with lock:
                        uploaded.append(info["dataset_id"])
                        latencies["upload"].append(0.0)
                k += 1
        except Exception as exc:  # noqa: BLE001 - reported below with the client's name
            with lock:
                errors.append(f"{name}: {type(exc).__name__}: {exc}")

    threads = [threading.Thread(target=member, args=(i,), daemon=True)
               for i in range(N_CLIENTS)]
    t_start = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=SECONDS + 180)
    wall = time.perf_counter() - t_start
    n_requests = sum(statuses.values())
    print(f"\nload: {N_CLIENTS} clients for {SECONDS:.0f} s (wall {wall:.1f} s): "
          f"{n_requests} requests, {n_requests / wall:.1f}/s, statuses {dict(statuses)}; "
          f"{len(comments_ok)} comments and {len(decisions_ok)} decisions stored "
          f"({len(decisions_refused)} stale decisions refused with 409), "
          f"{len(uploaded)} uploads under load")
    for kind, vals in sorted(latencies.items()):
        if kind == "upload":
            continue
        print(f"  {kind:<14} n={len(vals):>5}  p50 {1000 * _percentile(vals, 50):7.1f} ms  "
              f"p95 {1000 * _percentile(vals, 95):7.1f} ms  max {1000 * max(vals):7.1f} ms")
    assert not any(t.is_alive() for t in threads), "a client did not stop by itself"
    assert errors == [], errors[:5]
    assert not [s for s in statuses if s >= 500], sorted(by_kind.items())
    assert comments_other == {}, list(comments_other.items())[:5]

    # accounting: everything acknowledged is stored once, nothing else is stored
    stored_comments: collections.Counter[str] = collections.Counter()
    stored_decisions: collections.Counter[tuple[int, str]] = collections.Counter()
    for ds in datasets:
        for c in up.get(f"/api/datasets/{ds}/comments").json()["comments"]:
            stored_comments[c["body"]] += 1
        for d in up.get(f"/api/datasets/{ds}/decisions").json()["history"]:
            stored_decisions[(ds, d["rationale"])] += 1
    assert set(stored_comments) == comments_ok
    assert all(n == 1 for n in stored_comments.values())
    assert set(stored_decisions) == set(decisions_ok)
    assert all(n == 1 for n in stored_decisions.values())
    assert not set(decisions_refused) & set(stored_decisions)
    jobs = {ds: up.wait_for_job(ds, timeout=240)["state"] for ds in datasets + uploaded}
    assert set(jobs.values()) == {"done"}, jobs

    print(f"load accounting: {len(stored_comments)} comments and {len(stored_decisions)} "
          f"decisions found stored, {len(jobs)} analyses done; lost: 0, duplicated: 0")
