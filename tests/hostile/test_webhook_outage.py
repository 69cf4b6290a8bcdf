"""A webhook receiver that is down, then slow, then gone (410), and a service restart in the
middle of an outage. The receiver is a real HTTP server on loopback that verifies every
signature with the `standardwebhooks` package (a reference implementation of the open
specification). Events are retried with backoff, delivered once the receiver is back, a 410
disables the endpoint and says so, and a crash of the service loses no event."""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator
from datetime import timedelta
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx
import pytest
from sqlalchemy import Engine
from standardwebhooks import Webhook

from belated.alerts import delivery, evaluate
from belated.alerts.tables import Rule
from belated.app import create_app
from belated.clock import clock, now
from belated.config import Settings
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.tables import ModelRow
from belated.timeutil import parse_ts
from tests.conftest import free_port, make_tenant
from tests.hostile.pgcluster import ServiceProcess, random_name
from tests.support import rows, wait_until
from tests.support.stores import fresh_store


class Sink:
    """A receiver on a chosen loopback port: it verifies and records each event on arrival,
    waits `delay` seconds, then answers `status`. Not listening at all until started."""

    def __init__(self, port: int, secret: str) -> None:
        self.port, self.secret = port, secret
        self.delay, self.status = 0.0, 200
        self.ids: list[str] = []
        self.events: list[dict[str, Any]] = []
        self.calls = self.rejected = 0
        self.waited: list[float] = []  # the seconds waited before each answer, in order
        self.lock = threading.Lock()
        self.server: ThreadingHTTPServer | None = None

    def start(self) -> Sink:
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                body = self.rfile.read(int(self.headers.get("content-length", 0)))
                headers = {k.lower(): v for k, v in self.headers.items()}
                with outer.lock:
                    outer.calls += 1
                    delay, status = outer.delay, outer.status
                    try:
                        event = Webhook(outer.secret).verify(body, headers)
                    except Exception:
                        outer.rejected += 1
                        status = 400
                    else:
                        outer.ids.append(headers["webhook-id"])
                        outer.events.append(event)
                time.sleep(delay)
                with outer.lock:  # recorded before the answer leaves, so the sender sees it
                    outer.waited.append(delay)
                try:
                    self.send_response(status)
                    self.end_headers()
                except OSError:  # the sender gave up waiting: expected in the slow phase
                    pass

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self.server.serve_forever, daemon=True).start()
        return self

    def stop(self) -> None:
        if self.server is not None:
            self.server.shutdown()
            self.server.server_close()
            self.server = None

    def unique(self) -> list[str]:
        """webhook-ids of verified events, each once, in arrival order."""
        return list(dict.fromkeys(self.ids))


def _fire(factory: Any, c: Any, model: str) -> None:
    """A new hourly volume rule with low 1 on an idle model, evaluated now: one new event."""
    rule = c.post(
        f"/v1/models/{model}/rules", json={"kind": "traffic", "granularity": "hour", "low": 1}
    )
    assert rule.status_code == 201, rule.text
    with transaction(factory) as session:
        row = session.get(Rule, rule.json()["id"])
        assert row is not None
        model_row = session.get(ModelRow, row.model_id)
        assert model_row is not None
        assert evaluate.evaluate_rule(session, row, model_row, now(), 100)["events"] == 1


@pytest.fixture()
def world(store_url: str) -> Iterator[dict[str, Any]]:
    """A fresh store (a delivery run sees only this test's outbox), an app client with a
    tenant and a model, a webhook to a port where nothing listens yet, a frozen clock."""
    from fastapi.testclient import TestClient

    with fresh_store(store_url) as url:
        eng = make_engine(url)
        settings = Settings(database_url=url, jobs=False)
        factory = make_sessionmaker(eng)
        clock.set(now())
        try:
            with TestClient(create_app(settings, engine=eng, jobs=False)) as c:
                make_tenant(factory, c)
                port = free_port()
                hook = c.post(
                    "/v1/webhooks", json={"url": f"http://127.0.0.1:{port}/hooks/belated"}
                ).json()
                name = random_name("returns")
                assert c.post("/v1/models", json={"name": name}).status_code == 201
                sink = Sink(port, hook["secret"])
                yield {
                    "c": c,
                    "factory": factory,
                    "settings": settings,
                    "sink": sink,
                    "hook": hook,
                    "model": name,
                    "engine": eng,
                }
                sink.stop()
        finally:
            clock.set(None)
            eng.dispose()


def _log(w: dict[str, Any]) -> list[dict[str, Any]]:
    """The webhook's delivery log, oldest first."""
    r = w["c"].get(f"/v1/webhooks/{w['hook']['id']}/deliveries")
    assert r.status_code == 200
    return list(reversed(r.json()["items"]))


def _deliver(w: dict[str, Any], client: httpx.Client | None = None) -> dict[str, int]:
    return delivery.deliver_due(w["factory"], w["settings"], client=client)


@pytest.mark.slow
def test_down_then_slow_then_gone(world: dict[str, Any]) -> None:
    w, sink = world, world["sink"]
    _fire(w["factory"], w["c"], w["model"])
    # down: connection refused; each retry waits about twice as long as the one before.
    # Bounds: delivery.backoff draws from [c/2, c] with c = 5 s * 2^(attempt-1) (exponential
    # backoff with jitter, common practice).
    for attempt in range(1, 5):
        assert _deliver(w)["retrying"] == 1
        entry = _log(w)[0]
        assert entry["attempts"] == attempt and "ConnectError" in entry["last_error"]
        wait = (parse_ts(entry["next_attempt_at"]) - now()).total_seconds()
        ceiling = delivery.BASE_DELAY * 2 ** (attempt - 1)
        assert ceiling / 2 <= wait <= ceiling + 1e-3, (attempt, wait)
        assert sum(_deliver(w).values()) == 0  # not due again before its time
        clock.set(parse_ts(entry["next_attempt_at"]))
    # slow but within the 10 s client timeout: delivered on this attempt
    sink.delay = 3.0
    sink.start()
    assert _deliver(w)["delivered"] == 1
    assert sink.waited == [3.0]  # the one call was answered only after the 3 s wait
    entry = _log(w)[0]
    assert entry["state"] == "delivered" and entry["attempts"] == 5
    assert sink.unique() == [entry["event_id"]] and sink.rejected == 0
    assert sink.events[0]["type"] == "alert.raised"
    # slower than the sender waits (a 1 s client stands in for the 10 s default): the
    # receiver got it, the sender cannot know and retries with the same webhook-id
    _fire(w["factory"], w["c"], w["model"])
    sink.delay = 2.5
    with httpx.Client(timeout=1.0) as short:
        assert _deliver(w, short)["retrying"] == 1
    entry = _log(w)[1]
    assert "Timeout" in entry["last_error"] and entry["state"] == "pending"
    sink.delay = 0.0
    clock.set(parse_ts(entry["next_attempt_at"]))
    assert _deliver(w)["delivered"] == 1
    assert sink.ids.count(entry["event_id"]) == 2 and len(sink.unique()) == 2
    # gone: a 410 disables the endpoint and the log says so; nothing more is queued or sent
    _fire(w["factory"], w["c"], w["model"])
    sink.status = 410
    assert _deliver(w)["disabled"] == 1
    entry = _log(w)[2]
    assert entry["state"] == "disabled" and entry["last_status"] == 410
    assert "410" in entry["last_error"]
    listed = w["c"].get("/v1/webhooks").json()["items"]
    assert listed[0]["disabled_at"] and "410" in listed[0]["disabled_reason"]
    calls = sink.calls
    _fire(w["factory"], w["c"], w["model"])
    clock.set(now() + timedelta(hours=1))
    assert sum(_deliver(w).values()) == 0
    assert sink.calls == calls and len(_log(w)) == 3


def _outbox(eng: Engine, hook_id: str) -> list[tuple[str, str, int]]:
    return [
        tuple(r)
        for r in rows(
            eng,
            "SELECT event_id, state, attempts FROM deliveries WHERE webhook_id = :w ORDER BY id",
            w=hook_id,
        )
    ]


@pytest.mark.slow
def test_a_crash_during_an_outage_loses_no_event(store_url: str, tmp_path: Path) -> None:
    """The service (jobs on, real clock) opens two alerts while the receiver is down, is
    killed, and a new process delivers both events once the receiver is back."""
    with fresh_store(store_url) as url:
        eng = make_engine(url)
        try:
            _crash_scenario(url, eng, tmp_path)
        finally:
            eng.dispose()


def _crash_scenario(url: str, eng: Engine, tmp_path: Path) -> None:
    port = free_port()
    env = {"BELATED_JOBS": "true", "BELATED_LOG_FORMAT": "json"}
    first = ServiceProcess(url, tmp_path / "first.log", env=env).start()
    try:
        with httpx.Client(base_url=first.url, timeout=30) as c:
            make_tenant(make_sessionmaker(eng), c)
            hook = c.post(
                "/v1/webhooks", json={"url": f"http://127.0.0.1:{port}/hooks/belated"}
            ).json()
            name = random_name("returns")
            assert c.post("/v1/models", json={"name": name}).status_code == 201
            for low in (1, 2):
                assert (
                    c.post(
                        f"/v1/models/{name}/rules",
                        json={"kind": "traffic", "granularity": "hour", "low": low},
                    ).status_code
                    == 201
                )
            tried = wait_until(
                lambda: (
                    [o for o in _outbox(eng, hook["id"]) if o[2] >= 1]
                    if len(_outbox(eng, hook["id"])) == 2
                    else None
                ),
                60,
                step=0.2,
                what="two events tried while the receiver is down",
            )
            assert all(state == "pending" for _, state, _ in tried)
    finally:
        first.stop(signal.SIGKILL)  # a crash, not a clean stop
    pending = _outbox(eng, hook["id"])
    assert len(pending) == 2 and all(state == "pending" for _, state, _ in pending)
    sink = Sink(port, hook["secret"]).start()
    try:
        with ServiceProcess(url, tmp_path / "second.log", env=env):
            wait_until(
                lambda: len(sink.unique()) == 2, 60, step=0.2, what="both events after the restart"
            )
            wait_until(
                lambda: all(s == "delivered" for _, s, _ in _outbox(eng, hook["id"])),
                30,
                step=0.2,
                what="the outbox marked delivered",
            )
    finally:
        sink.stop()
    assert sorted(sink.unique()) == sorted(e for e, _, _ in pending)
    assert sink.rejected == 0
    alerts = {r[0] for r in rows(eng, "SELECT id FROM alerts")}
    assert {e["data"]["id"] for e in sink.events} == alerts and len(alerts) == 2
    assert all(e["type"] == "alert.raised" for e in sink.events)
