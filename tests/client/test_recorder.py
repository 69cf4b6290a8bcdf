"""The recorder against the service on loopback: refusals set aside, a full spool dropping
the newest rows, Retry-After honoured, flushes at close and at interpreter exit.

Counts of what was stored are read from the store with SQL (not through the API).
"""

from __future__ import annotations

import json
import logging
import subprocess
import sys
import threading
import time
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import Engine
from starlette.applications import Starlette
from starlette.requests import Request
from starlette.responses import JSONResponse, Response
from starlette.routing import Route

from belated.client import Recorder
from belated.client.spool import SpoolInUse
from tests.client.recording import Noted, spool_bytes, spool_files, spool_items
from tests.conftest import LiveServer, Tenant
from tests.support import base_time, count, create_model, rows, score_of, stamp, wait_until


def token(tenant: Tenant) -> str:
    """The all-scopes token of the tenant."""
    return tenant.tokens["admin,ingest,read"]


def stored_ids(engine: Engine, model: int) -> list[str]:
    """The ids of a model's stored predictions, in id order."""
    found = rows(engine, "SELECT pid FROM predictions WHERE model_id = :m ORDER BY pid", m=model)
    return [r[0] for r in found]


def test_a_422_batch_is_set_aside_once_and_the_other_batches_arrive(
    app: Any, tenant: Tenant, engine: Engine, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    sofas = create_model(tenant, engine, name="sofas-" + tenant.name[2:])
    tables = create_model(tenant, engine, name="tables-" + tenant.name[2:])
    base = base_time()
    noted = Noted(app)
    caplog.set_level(logging.WARNING, logger="belated.client.recorder")
    with LiveServer(noted) as live:
        rec = Recorder(live.url, token(tenant), spool_dir=str(tmp_path), flush_seconds=0.2)
        with rec:
            for n in range(300):
                rec.record_prediction(tables.name, f"table-{n}", base, score=score_of(n))
            for n in range(20):  # one score out of [0, 1]: the whole batch is refused
                rec.record_prediction(sofas.name, f"sofa-{n}", base, score=1.5 if n == 7 else 0.3)
            for n in range(300):
                rec.record_label(tables.name, f"table-{n}", n % 2)
        st = rec.stats()
        assert (st.sent, st.rejected, st.dropped, st.queued, st.spooled) == (600, 20, 0, 0, 0)
        # Refused once, never again; the other batches were taken.
        assert noted.posts(f"/v1/models/{sofas.name}/predictions") == [422]
        assert noted.posts(f"/v1/models/{tables.name}/predictions") == [200]
        assert noted.posts(f"/v1/models/{tables.name}/labels") == [200]
        assert count(engine, "predictions", sofas.id) == 0
        assert count(engine, "predictions", tables.id) == 300
        assert count(engine, "predictions", tables.id, "actual IS NOT NULL") == 300

        # rejected/ holds the body as sent and the problem details beside it, one of each.
        kept = sorted((tmp_path / "rejected").iterdir())
        assert [p.name.endswith(".problem.json") for p in kept] == [False, True]
        body, note = json.loads(kept[0].read_bytes()), json.loads(kept[1].read_bytes())
        assert [p["id"] for p in body["predictions"]] == [f"sofa-{n}" for n in range(20)]
        assert note["status"] == 422 and note["path"] == f"/v1/models/{sofas.name}/predictions"
        assert {(e["index"], e["field"]) for e in note["problem"]["errors"]} == {(7, "score")}
        warnings = [r.getMessage() for r in caplog.records if r.name == "belated.client.recorder"]
        assert len(warnings) == 1 and "422" in warnings[0] and "score" in warnings[0]

        # A person fixes the row and re-sends the file as it stands: now it is stored.
        body["predictions"][7]["score"] = 0.3
        fixed = httpx.post(
            f"{live.url}{note['path']}",
            content=json.dumps(body),
            headers={"Authorization": f"Bearer {token(tenant)}"},
        )
        assert fixed.status_code == 200 and fixed.json()["accepted"] == 20
    assert count(engine, "predictions", sofas.id) == 20


def test_a_409_conflict_is_set_aside_and_the_stored_row_kept(
    live: LiveServer, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    base = base_time()
    with Recorder(live.url, token(tenant), spool_dir=str(tmp_path), flush_seconds=0.05) as rec:
        rec.record_prediction(model.name, "sofa-1", base, score=0.25)
        wait_until(lambda: rec.stats().sent == 1, 30, what=rec.stats)
        rec.record_prediction(model.name, "sofa-1", base, score=0.25)  # a repeat: a duplicate
        wait_until(lambda: rec.stats().sent == 2, 30, what=rec.stats)
        rec.record_prediction(model.name, "sofa-1", base, score=0.75)  # other content: 409
        wait_until(lambda: rec.stats().rejected == 1, 30, what=rec.stats)
    note = next((tmp_path / "rejected").glob("*.problem.json"))
    assert json.loads(note.read_bytes())["status"] == 409
    assert rows(engine, "SELECT score FROM predictions WHERE model_id = :m", m=model.id) == [
        (0.25,)
    ]


def test_a_full_spool_drops_the_newest_rows_and_counts_them(
    app: Any, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    base = base_time()
    server = LiveServer(app, hold_port=True)  # refuses connections until it starts
    limit = 40_000
    rec = Recorder(
        server.url,
        token(tenant),
        spool_dir=str(tmp_path),
        spool_max_bytes=limit,
        batch_size=100,
        flush_seconds=0.05,
        queue_size=500,
        backoff=0.05,
        max_backoff=0.2,
    )
    offered = 5_000
    accepted = [
        f"o-{n:05d}"
        for n in range(offered)
        if rec.record_prediction(model.name, f"o-{n:05d}", base, score=score_of(n))
    ]
    st = rec.close(timeout=1.0)  # the service never answered: what fits stays in the spool
    kept = [item["id"] for item in spool_items(tmp_path)]
    assert st.sent == 0 and st.queued == 0 and st.rejected == 0
    assert 0 < len(kept) == st.spooled < offered
    assert st.dropped == offered - len(kept)  # every row is either kept or counted
    assert spool_bytes(tmp_path) <= limit
    # The newest were dropped: what is kept is the oldest of what the queue took, in order.
    assert kept == accepted[: len(kept)]

    with server:  # the service is back: a recorder on the same spool sends what was kept
        again = Recorder(server.url, token(tenant), spool_dir=str(tmp_path), backoff=0.05)
        wait_until(lambda: again.stats().sent == len(kept), 60, what=again.stats)
        assert again.close(timeout=5).spooled == 0
    assert stored_ids(engine, model.id) == kept
    assert spool_files(tmp_path) == []


def test_retry_after_is_honoured_on_503_and_429(tmp_path: Path) -> None:
    script: list[tuple[int, str | None]] = [(503, "1"), (429, "1"), (503, "2"), (200, None)]
    arrivals: list[tuple[float, bytes]] = []

    async def predictions(request: Request) -> Response:
        arrivals.append((time.monotonic(), await request.body()))
        status, wait = script[min(len(arrivals), len(script)) - 1]
        if status == 200:
            return JSONResponse({"accepted": 10, "duplicates": 0})
        problem = {"title": "Busy", "status": status, "detail": "try later"}
        return JSONResponse(problem, status_code=status, headers={"Retry-After": str(wait)})

    busy = Starlette(routes=[Route("/v1/models/{m}/predictions", predictions, methods=["POST"])])
    with LiveServer(busy) as live:
        # Backoff alone would retry within 50 ms; only Retry-After explains longer waits.
        rec = Recorder(
            live.url,
            "t",
            spool_dir=str(tmp_path),
            flush_seconds=0.05,
            backoff=0.01,
            max_backoff=0.05,
        )
        for n in range(10):
            rec.record_prediction("sofas", f"s-{n}", base_time(), score=0.5)
        wait_until(lambda: rec.stats().sent == 10, 30, what=rec.stats)
        st = rec.close()
    assert len(arrivals) == 4 and len({body for _, body in arrivals}) == 1  # one batch, re-sent
    gaps = [b[0] - a[0] for a, b in zip(arrivals, arrivals[1:], strict=False)]
    assert gaps[0] >= 1.0 and gaps[1] >= 1.0 and gaps[2] >= 2.0, gaps
    assert st.spilled == 10 and st.spooled == 0 and st.dropped == 0
    assert st.last_error is not None and "503" in st.last_error


def test_bad_arguments_and_late_records_are_counted_never_raised(tmp_path: Path) -> None:
    server = LiveServer(Starlette(), hold_port=True)  # never started: nothing listens
    rec = Recorder(server.url, "t", spool_dir=str(tmp_path), flush_seconds=0.05)
    with pytest.raises(SpoolInUse):  # one process at a time owns a spool
        Recorder(server.url, "t", spool_dir=str(tmp_path))
    assert rec.record_prediction("sofas", "ok-1", base_time(), score=0.4)
    assert not rec.record_prediction("../../etc", "x", base_time(), score=0.4)
    odd: list[Any] = [object(), "high", [1]]  # what a caller's bug may pass
    assert not rec.record_prediction("sofas", "x", odd[0], score=0.4)
    assert not rec.record_prediction("sofas", "x", base_time(), score=odd[1])
    assert not rec.record_label("sofas", "x", odd[2])
    st = rec.close(timeout=0.5)
    assert not rec.record_label("sofas", "ok-1", 1)
    assert rec.stats().dropped == st.dropped + 1 == 5
    assert st.spooled == 1 and st.last_error is not None
    assert [item["id"] for item in spool_items(tmp_path)] == ["ok-1"]
    server.held.close()  # type: ignore[union-attr]


CHILD = """
import sys
from belated.client import Recorder
url, token, model, ts = sys.argv[1:5]
rec = Recorder(url, token, flush_seconds=30)
for n in range(250):
    rec.record_prediction(model, f"exit-{n}", ts, score=(n % 10) / 10)
rec.record_label(model, "exit-3", 1)
# no close(): the interpreter's exit flushes
"""


def test_interpreter_exit_flushes_what_is_queued(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    done = subprocess.run(
        [sys.executable, "-c", CHILD, live.url, token(tenant), model.name, stamp(base_time())],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert count(engine, "predictions", model.id) == 250
    assert count(engine, "predictions", model.id, "actual IS NOT NULL") == 1


def test_rows_from_many_threads_arrive_once(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    base = base_time()
    rec = Recorder(live.url, token(tenant), batch_size=300, flush_seconds=0.1)

    def record(k: int) -> None:
        for n in range(1_000):
            rec.record_prediction(model.name, f"t{k}-{n}", base, score=score_of(n), tags={"k": k})

    threads = [threading.Thread(target=record, args=(k,)) for k in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    st = rec.close(timeout=30)
    assert (st.sent, st.dropped, st.spilled) == (4_000, 0, 0)
    assert count(engine, "predictions", model.id) == 4_000
    assert count(engine, "predictions", model.id, "pid = 't3-999'") == 1
