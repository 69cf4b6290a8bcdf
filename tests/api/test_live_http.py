"""The service over real HTTP: uvicorn on a loopback port, a real httpx client."""

from __future__ import annotations

import asyncio
import json
import sqlite3
import sys
from collections.abc import Iterator
from datetime import datetime, timedelta
from typing import Any

import httpx
from sqlalchemy import Engine

from belated.app import create_app
from belated.config import Settings
from tests.conftest import LiveServer, Tenant, make_tenant
from tests.support import (
    base_time,
    count,
    create_model,
    label,
    model_body,
    model_id,
    outcome_of,
    predictions,
    rows,
    tags,
)

TOTAL = 5000
BATCH = 1000


def test_round_trip_of_5000_predictions_and_their_labels(
    live: LiveServer, sessions: Any, engine: Engine
) -> None:
    with httpx.Client(base_url=live.url, timeout=60) as http:
        tenant = make_tenant(sessions, http)
        body = model_body(segment_keys=["region"])
        assert http.post("/v1/models", json=body).status_code == 201
        name = body["name"]
        # one a minute over three and a half days, ending two days ago
        items = predictions(TOTAL, base=base_time() - timedelta(days=4), tags={"region": "north"})
        for start in range(0, TOTAL, BATCH):
            r = http.post(
                f"/v1/models/{name}/predictions", json={"predictions": items[start : start + BATCH]}
            )
            assert r.status_code == 200, r.text
            assert r.json() == {"accepted": BATCH, "duplicates": 0}
        # a retried batch is recognised, not stored twice
        r = http.post(f"/v1/models/{name}/predictions", json={"predictions": items[:BATCH]})
        assert r.json() == {"accepted": 0, "duplicates": BATCH}
        labelled = items[: TOTAL * 3 // 5]
        answers = {"matched": 0, "pending": 0, "corrected": 0, "unchanged": 0, "expired": 0}
        sent = [label(p["id"], outcome_of(n)) for n, p in enumerate(labelled)]
        sent += [label(f"order-unknown-{n}", "0") for n in range(250)]
        for start in range(0, len(sent), BATCH):
            r = http.post(f"/v1/models/{name}/labels", json={"labels": sent[start : start + BATCH]})
            assert r.status_code == 200, r.text
            for key, value in r.json().items():
                answers[key] += value
        assert answers == {
            "matched": len(labelled),
            "pending": 250,
            "corrected": 0,
            "unchanged": 0,
            "expired": 0,
        }
        got = http.get(f"/v1/models/{name}").json()
        assert got["counts"] == {
            "predictions": TOTAL,
            "labelled": len(labelled),
            "pending_labels": 250,
        }
        times = [datetime.fromisoformat(p["ts"]) for p in items]
        assert datetime.fromisoformat(got["first_prediction_at"]) == min(times)
        assert datetime.fromisoformat(got["last_prediction_at"]) == max(times)
        # the answer matches the store
        mid = model_id(engine, tenant.project_id, name)
        assert count(engine, "predictions", mid) == TOTAL
        assert count(engine, "predictions", mid, "actual = '1'") == sum(
            outcome_of(n) == "1" for n in range(len(labelled))
        )


def test_healthz_reports_the_store_up(live: LiveServer) -> None:
    r = httpx.get(f"{live.url}/healthz", timeout=10)
    assert r.status_code == 200
    got = r.json()
    assert got["status"] == "ok" and got["store"] == "up"
    assert got["jobs"] == {"enabled": False, "leader": False}
    assert isinstance(got["dirty_buckets"], int)


def _chunks(data: bytes, size: int) -> Iterator[bytes]:
    for start in range(0, len(data), size):
        yield data[start : start + size]


def test_body_limit_counts_received_bytes_of_a_chunked_body(
    store_url: str, engine: Engine, sessions: Any
) -> None:
    """No Content-Length: the limit must hold on the bytes as they arrive."""
    settings = Settings(database_url=store_url, jobs=False, max_body_bytes=2048)
    with (
        LiveServer(create_app(settings, engine=engine, jobs=False)) as server,
        httpx.Client(base_url=server.url, timeout=30) as http,
    ):
        tenant = make_tenant(sessions, http)
        body = model_body()
        assert http.post("/v1/models", json=body).status_code == 201
        mid = model_id(engine, tenant.project_id, body["name"])
        url = f"/v1/models/{body['name']}/predictions"
        big = json.dumps({"predictions": predictions(8, tags=tags(8, value_len=64))}).encode()
        assert len(big) > 2048
        r = http.post(url, content=_chunks(big, 512), headers={"content-type": "application/json"})
        assert r.status_code == 413
        assert r.headers["content-type"].startswith("application/problem+json")
        assert count(engine, "predictions", mid) == 0
        assert count(engine, "dirty_buckets", mid) == 0
        small = json.dumps({"predictions": predictions(3)}).encode()
        r = http.post(
            url, content=_chunks(small, 100), headers={"content-type": "application/json"}
        )
        assert r.status_code == 200, r.text
        assert count(engine, "predictions", mid) == 3


def _visible(engine: Engine, store_url: str, sql: str, **params: Any) -> int:
    """Count rows from a separate connection, so only committed data is seen.

    On SQLite a plain sqlite3 reader in autocommit mode (the engine would BEGIN IMMEDIATE and
    wait for the writer we are observing).
    """
    if store_url.startswith("sqlite"):
        conn = sqlite3.connect(store_url.removeprefix("sqlite:///"), isolation_level=None)
        try:
            return int(conn.execute(sql.replace(":m", "?"), list(params.values())).fetchone()[0])
        finally:
            conn.close()
    return int(rows(engine, sql, **params)[0][0])


def test_the_answer_is_sent_only_after_the_commit(
    app: Any, tenant: Tenant, engine: Engine, store_url: str
) -> None:
    """A client that reads its 200 may rely on the batch being stored (DESIGN: every answer
    reflects all data acknowledged before the request), so the commit precedes the answer."""
    model = create_model(tenant, engine)
    body = json.dumps({"predictions": predictions(3)}).encode()
    seen_at_answer: list[int] = []

    async def receive() -> dict[str, Any]:
        return {"type": "http.request", "body": body, "more_body": False}

    async def send(message: dict[str, Any]) -> None:
        if message["type"] == "http.response.start":
            seen_at_answer.append(message["status"])
            seen_at_answer.append(
                _visible(
                    engine,
                    store_url,
                    "SELECT count(*) FROM predictions WHERE model_id = :m",
                    m=model.id,
                )
            )

    token = tenant.tokens["ingest"].encode()
    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": "POST",
        "scheme": "http",
        "path": f"/v1/models/{model.name}/predictions",
        "query_string": b"",
        "root_path": "",
        "client": ("127.0.0.1", 50000),
        "server": ("127.0.0.1", 80),
        "headers": [
            (b"authorization", b"Bearer " + token),
            (b"content-type", b"application/json"),
            (b"content-length", str(len(body)).encode()),
        ],
    }
    asyncio.run(app(scope, receive, send))
    assert seen_at_answer == [200, 3]


def test_a_large_batch_is_parsed_once(
    live: LiveServer, sessions: Any, engine: Engine, monkeypatch: Any
) -> None:
    """The small-request road parses a body to learn its size; a batch too large for it goes
    on to the route, which must take the parsed body rather than parse it again (a second
    parse was a seventh of the service's time for 10,000 predictions in bench/ingest.py).
    Over uvicorn, as the service runs."""
    import orjson

    with httpx.Client(base_url=live.url, timeout=60) as http:
        tenant = make_tenant(sessions, http)
        model = create_model(tenant, engine)
        url = f"/v1/models/{model.name}/predictions"
        assert http.post(url, json={"predictions": predictions(1)}).status_code == 200
        parse = orjson.loads
        parsed: list[tuple[int, str]] = []  # (bytes parsed, the function that parsed them)

        def counting(data: Any) -> Any:
            parsed.append((len(data), sys._getframe(1).f_code.co_name))
            return parse(data)

        monkeypatch.setattr(orjson, "loads", counting)
        body = orjson.dumps({"predictions": predictions(300, start=1)})  # above the road's 200
        r = http.post(url, content=body, headers={"content-type": "application/json"})
        assert r.status_code == 200 and r.json()["accepted"] == 300
        # parsed once, by the road (api/fastpath.py), which then left the batch to the route
        assert [name for n, name in parsed if n == len(body)] == ["_answer"], parsed
        assert count(engine, "predictions", model.id) == 301
