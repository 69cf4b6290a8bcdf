"""The scheduled refresh: a JobRunner on a store of the test's own empties the dirty buckets,
and a failing step neither stops the steps after it nor the schedule.

Rollups are checked against plain SQL counts over the raw prediction rows.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from sqlalchemy import Engine

from belated.config import Settings
from belated.jobs import JobRunner, refresh_step
from belated.store.db import make_engine
from tests.conftest import STORES, Tenant
from tests.support import (
    count,
    create_model,
    label,
    outcome_of,
    predictions,
    rows,
    send_both,
    wait_until,
)
from tests.support.stores import fresh_store

WAIT_SECONDS = 30


@pytest.fixture(params=STORES)
def store_url(request: pytest.FixtureRequest) -> Iterator[str]:
    """A store of this test's own: the runner refreshes every model in its store, so it must
    see only what this test wrote (not the session store other tests fill)."""
    with fresh_store(request.param, prefix="belated_job") as url:
        yield url


@pytest.fixture()
def engine(store_url: str) -> Iterator[Engine]:
    """An engine on the test's own store."""
    eng = make_engine(store_url)
    yield eng
    eng.dispose()


def ingest_some(tenant: Tenant, model: str) -> list[dict[str, Any]]:
    """240 predictions over four hours (one a minute), two thirds of them labelled."""
    items = predictions(240)
    labels = [label(p["id"], outcome_of(n)) for n, p in enumerate(items) if n % 3]
    send_both(tenant.client, model, items, labels)
    return items


def assert_rollups_match_raw_rows(engine: Engine, model_id: int) -> None:
    """Every hour's whole-model rollup equals counts over its raw rows."""
    raw = {
        r[0]: tuple(r[1:])
        for r in rows(
            engine,
            """
        SELECT hour, count(*), count(actual),
          sum(CASE WHEN predicted = '1' AND actual = '1' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '1' AND actual = '0' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '0' AND actual = '1' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '0' AND actual = '0' THEN 1 ELSE 0 END)
        FROM predictions WHERE model_id = :m GROUP BY hour""",
            m=model_id,
        )
    }
    rolled = {
        r[0]: tuple(r[1:])
        for r in rows(
            engine,
            """
        SELECT start, n_pred, n_labelled, tp, fp, fn, tn FROM rollups
        WHERE model_id = :m AND level = 'h' AND seg_key = ''""",
            m=model_id,
        )
    }
    assert raw and rolled == raw


def test_the_scheduled_refresh_empties_the_dirty_buckets(
    tenant: Tenant, engine: Engine, store_url: str
) -> None:
    model = create_model(tenant, engine)
    ingest_some(tenant, model.name)
    assert count(engine, "dirty_buckets", model.id) > 0
    runner = JobRunner(
        engine=engine, settings=Settings(database_url=store_url, refresh_seconds=0.5)
    )
    runner.start()
    try:
        wait_until(
            lambda: count(engine, "dirty_buckets", model.id) == 0,
            WAIT_SECONDS,
            what="the dirty buckets emptied",
        )
        assert runner.is_leader()
    finally:
        runner.stop()
    assert_rollups_match_raw_rows(engine, model.id)
    assert runner.runs >= 1 and "error" not in runner.last["refresh"]
    state = rows(engine, "SELECT value FROM service_state WHERE key = 'last_refresh'")
    assert len(state) == 1


def test_a_failing_step_stops_neither_the_others_nor_the_schedule(
    tenant: Tenant, engine: Engine, store_url: str
) -> None:
    model = create_model(tenant, engine)
    calls = {"broken": 0, "after": 0}

    def broken(_: Any) -> dict[str, Any]:
        calls["broken"] += 1
        raise RuntimeError("this step fails on purpose")

    def after(_: Any) -> dict[str, Any]:
        calls["after"] += 1
        return {"ok": True}

    runner = JobRunner(
        engine=engine,
        settings=Settings(database_url=store_url, refresh_seconds=0.5),
        steps=[("broken", broken), ("refresh", refresh_step), ("after", after)],
    )
    runner.start()
    try:
        wait_until(
            lambda: calls["broken"] >= 2 and calls["after"] >= 2,
            WAIT_SECONDS,
            what=lambda: f"two runs of every step: {calls}",
        )
        # data written while the schedule runs is still refreshed
        ingest_some(tenant, model.name)
        wait_until(
            lambda: count(engine, "dirty_buckets", model.id) == 0,
            WAIT_SECONDS,
            what="the dirty buckets emptied",
        )
        wait_until(lambda: calls["broken"] >= 4, WAIT_SECONDS, what=lambda: f"four runs: {calls}")
        assert runner.scheduler.get_job("belated.refresh") is not None
    finally:
        runner.stop()
    assert runner.last["broken"]["error"] is True
    assert runner.last["after"]["ok"] is True
    assert calls["after"] >= 3
    assert_rollups_match_raw_rows(engine, model.id)
