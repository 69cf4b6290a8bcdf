"""The jobs drop pending labels that waited longer than their model's keep_raw_days, and
count them in /healthz and in the Prometheus exposition (parsed by prometheus_client's own
parser), on a store of the test's own (the jobs sweep every model of their store)."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta

import pytest
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import Engine

from belated.clock import clock
from belated.config import Settings
from belated.jobs import JobRunner
from belated.store.db import make_engine
from tests.conftest import STORES, Tenant
from tests.support import count, create_model, send
from tests.support.stores import fresh_store

T0 = datetime(2026, 10, 5, 8, 0, tzinfo=UTC)


@pytest.fixture(params=STORES)
def store_url(request: pytest.FixtureRequest) -> Iterator[str]:
    """A store of this test's own."""
    with fresh_store(request.param, prefix="belated_pend") as url:
        yield url


@pytest.fixture()
def engine(store_url: str) -> Iterator[Engine]:
    """An engine on the test's own store."""
    eng = make_engine(store_url)
    yield eng
    eng.dispose()


def _waiting(tenant: Tenant, model: str, ids: list[str]) -> None:
    answer = send(tenant.client, model, "labels", [{"id": i, "actual": "1"} for i in ids])
    assert answer["pending"] == len(ids)


def _dropped_counter(tenant: Tenant) -> float:
    text = tenant.client.get("/metrics", headers={"Authorization": ""}).text
    for family in text_string_to_metric_families(text):
        if family.name == "belated_pending_labels_dropped":
            return float(family.samples[0].value)
    raise AssertionError("no belated_pending_labels_dropped_total in the scrape")


def test_the_jobs_drop_pending_labels_past_keep_raw_days_and_count_them(
    tenant: Tenant, engine: Engine, store_url: str
) -> None:
    short = create_model(tenant, engine, label_delay_days=14, keep_raw_days=20)
    usual = create_model(tenant, engine, label_delay_days=14)  # kept 44 days by default
    clock.set(T0)
    _waiting(tenant, short.name, ["a-1", "a-2", "a-3"])
    _waiting(tenant, usual.name, ["b-1", "b-2"])
    clock.set(T0 + timedelta(days=10))
    _waiting(tenant, short.name, ["a-4"])
    assert tenant.client.get("/healthz").json()["pending_labels_dropped"] == 0
    assert _dropped_counter(tenant) == 0

    runner = JobRunner(engine=engine, settings=Settings(database_url=store_url))
    try:
        clock.set(T0 + timedelta(days=20, seconds=-1))  # not yet: 20 days are kept
        assert runner.tick() is not None
        assert runner.last["pending"]["dropped"] == 0
        assert count(engine, "pending_labels", short.id) == 4

        clock.set(T0 + timedelta(days=21))
        runner.tick()
        assert runner.last["pending"]["dropped"] == 3
        assert count(engine, "pending_labels", short.id) == 1
        assert count(engine, "pending_labels", usual.id) == 2
        listed = tenant.client.get(f"/v1/models/{short.name}/pending").json()["items"]
        assert [p["id"] for p in listed] == ["a-4"]

        clock.set(T0 + timedelta(days=45))
        runner.tick()
        assert runner.last["pending"]["dropped"] == 3  # a-4 after 35 days, b-* after 45
        assert count(engine, "pending_labels", short.id) == 0
        assert count(engine, "pending_labels", usual.id) == 0
    finally:
        runner.leader.release()
    assert tenant.client.get("/healthz").json()["pending_labels_dropped"] == 6
    assert _dropped_counter(tenant) == 6
