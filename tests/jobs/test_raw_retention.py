"""Retention with rollups kept, on both stores, each test on a store of its own (the jobs
sweep every model of their store): the jobs drop a model's settled raw days past
keep_raw_days, and every window answers field by field as before the drop; a rebuild
afterwards changes nothing; the raw rows are gone (read with the database's own client,
sqlite3 or psycopg) and the rollups are untouched; a late label for a dropped id is
`expired` and stored nowhere; a back-fill before the retained days is a 422 naming the item
and field with nothing stored; erasure of a dropped id reports it `expired`; a day with
work outstanding is not dropped.

The reference for "as before" is the service's own answers captured before the drop, and
the rollup rows read before it; the row counts are those of the data this test sends.
"""

from __future__ import annotations

import logging
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families
from sqlalchemy import Engine

from belated.clock import clock
from belated.config import Settings
from belated.jobs import JobRunner, steps
from belated.store import dirty, refresh
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.tables import ModelRow
from belated.web import views
from tests.conftest import STORES, Tenant
from tests.support import counts, create_model, send, stamp
from tests.support.retention import (
    FIRST_KEPT,
    KEEP,
    NOW,
    SETTINGS,
    START,
    differences,
    direct,
    every_window,
    hour_of,
    rollup_rows,
    shop_data,
)
from tests.support.stores import fresh_store


@pytest.fixture(params=STORES)
def store_url(request: pytest.FixtureRequest) -> Iterator[str]:
    """A store of this test's own."""
    with fresh_store(request.param, prefix="belated_ret") as url:
        yield url


@pytest.fixture()
def engine(store_url: str) -> Iterator[Engine]:
    """An engine on the test's own store."""
    eng = make_engine(store_url)
    yield eng
    eng.dispose()


@pytest.fixture()
def runner(engine: Engine, store_url: str) -> Iterator[JobRunner]:
    """The jobs on the test's store, run one tick at a time."""
    jobs = JobRunner(engine=engine, settings=Settings(database_url=store_url))
    yield jobs
    jobs.leader.release()


def loaded(tenant: Tenant, engine: Engine, seed: int = 5) -> tuple[Any, list[dict[str, Any]]]:
    """A model with the shop's 100 days sent at NOW and refreshed; its predictions."""
    clock.set(NOW)
    model = create_model(tenant, engine, **SETTINGS)
    preds, labels = shop_data(seed)
    assert send(tenant.client, model.name, "predictions", preds)["accepted"] == len(preds)
    send(tenant.client, model.name, "labels", labels)
    sessions = make_sessionmaker(engine)
    refresh.join_and_mark(sessions)
    refresh.refresh_all(sessions, max_values=100)
    return model, preds


def test_dropping_raw_days_keeps_every_window_and_a_rebuild_changes_nothing(
    tenant: Tenant, engine: Engine, runner: JobRunner, caplog: pytest.LogCaptureFixture
) -> None:
    model, preds = loaded(tenant, engine)
    before = every_window(tenant.client, model.name)
    rollups_before = rollup_rows(engine, model.id)
    dropped = [p for p in preds if hour_of(p) < FIRST_KEPT]
    assert 60 * 20 < len(dropped) < len(preds)
    assert tenant.client.get("/healthz").json()["raw_rows_dropped"] == 0

    runner.tick()
    assert runner.last["retention"]["rows"] == len(dropped)
    assert runner.last["retention"]["days"] == len({hour_of(p) // 24 for p in dropped})
    (first,) = direct(engine, "SELECT raw_from_hour FROM models WHERE id = ?", model.id)
    assert first == (FIRST_KEPT,)

    # (c) raw rows of the dropped days gone, their ids recorded, the rollups untouched
    ids = [p["id"] for p in dropped]
    assert direct(engine, "SELECT count(*) FROM predictions WHERE model_id = ?", model.id) == [
        (len(preds) - len(dropped),)
    ]
    assert direct(
        engine,
        "SELECT count(*) FROM predictions WHERE model_id = ? AND hour < ?",
        model.id,
        FIRST_KEPT,
    ) == [(0,)]
    history = {
        pid for (pid,) in direct(engine, "SELECT pid FROM labels WHERE model_id = ?", model.id)
    }
    assert history and not history & set(ids)
    # kept one more keep_raw_days: the ids of days older than that are forgotten at once
    recorded = direct(engine, "SELECT pid FROM dropped_ids WHERE model_id = ?", model.id)
    remembered = [p["id"] for p in dropped if hour_of(p) >= FIRST_KEPT - KEEP * 24]
    assert 0 < len(remembered) < len(ids)
    assert sorted(pid for (pid,) in recorded) == sorted(remembered)
    assert rollup_rows(engine, model.id) == rollups_before

    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert datetime.fromisoformat(got["raw_kept_from"]) == datetime.fromtimestamp(
        FIRST_KEPT * 3600, UTC
    )
    # the model page still opens on the first day, whose raw rows are gone
    with make_sessionmaker(engine)() as session:
        assert views.first_prediction(session, session.get_one(ModelRow, model.id)) == START

    # (a) every window as before, field by field
    after = every_window(tenant.client, model.name)
    assert differences(before, after) == []
    health = tenant.client.get("/healthz").json()
    assert (health["raw_rows_dropped"], health["raw_days_dropped"]) == (
        len(dropped),
        runner.last["retention"]["days"],
    )
    scrape = tenant.client.get("/metrics", headers={"Authorization": ""}).text
    found = {f.name: f.samples[0].value for f in text_string_to_metric_families(scrape)}
    assert found["belated_raw_rows_dropped"] == len(dropped)

    # a recompute asked for a dropped hour is discarded, with a warning, the rollups kept
    sessions = make_sessionmaker(engine)
    with transaction(sessions) as session:
        dirty.mark(session=session, model_id=model.id, hours=[FIRST_KEPT - 30], lock=None)
    with caplog.at_level(logging.WARNING, logger="belated.store.raw_retention"):
        refresh.refresh_all(sessions, max_values=100)
    assert "below raw_from_hour" in caplog.text
    assert direct(engine, "SELECT count(*) FROM dirty_buckets WHERE model_id = ?", model.id) == [
        (0,)
    ]
    assert rollup_rows(engine, model.id) == rollups_before

    # (b) a rebuild rebuilds the retained days only, and changes nothing
    assert refresh.rebuild(sessions, max_values=100, model_id=model.id) > 0
    # floats within 1e-9 relative: the retained hours are summed again in another order
    assert differences(before, every_window(tenant.client, model.name), rel=1e-9) == []
    rebuilt = rollup_rows(engine, model.id)
    old = {k: v for k, v in rollups_before.items() if k[1] < FIRST_KEPT}
    assert old and {k: v for k, v in rebuilt.items() if k[1] < FIRST_KEPT} == old
    assert set(rebuilt) == set(rollups_before)

    # a second run finds nothing more to drop
    runner.tick()
    assert runner.last["retention"]["rows"] == 0


def test_a_label_for_a_dropped_id_is_expired_and_stored_nowhere(
    tenant: Tenant, engine: Engine, runner: JobRunner
) -> None:
    model, preds = loaded(tenant, engine, seed=6)
    runner.tick()
    dropped = [p["id"] for p in preds if FIRST_KEPT - KEEP * 24 <= hour_of(p) < FIRST_KEPT]
    kept = [p["id"] for p in preds if hour_of(p) >= FIRST_KEPT]
    labelled = {x["id"]: x for x in shop_data(6)[1]}
    same = [labelled[i] for i in kept if i in labelled][:400]  # unchanged: nothing written
    assert len(dropped) + len(same) == 1100
    tables = counts(engine, model.id)
    rollups_before = rollup_rows(engine, model.id)
    # small (grouped), then a large batch of distinct ids (set-based on PostgreSQL), then a
    # large batch with a repeated id (row by row)
    small = send(
        tenant.client, model.name, "labels", [{"id": i, "actual": "1"} for i in dropped[:3]]
    )
    assert small == {"matched": 0, "pending": 0, "corrected": 0, "unchanged": 0, "expired": 3}
    many = [{"id": i, "actual": "0"} for i in dropped] + same
    r = tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": many})
    assert r.status_code == 200, r.text
    assert r.json()["expired"] == len(dropped) and r.json()["unchanged"] == len(same)
    assert sum(r.json().values()) == len(many)
    repeated = [{"id": i, "actual": "0"} for i in dropped[:250]] + [
        {"id": dropped[0], "actual": "0"}
    ]
    r = tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": repeated})
    assert r.status_code == 200, r.text
    assert r.json()["expired"] == 251 and sum(r.json().values()) == 251
    assert counts(engine, model.id) == tables
    assert rollup_rows(engine, model.id) == rollups_before

    # beside them, a retained id and an id never sent: the five counts add up
    mixed = [
        {"id": dropped[5], "actual": "1"},
        {"id": kept[-1], "actual": "1"},
        {"id": "order-never-sent", "actual": "1"},
    ]
    answer = send(tenant.client, model.name, "labels", mixed)
    assert answer["expired"] == 1 and answer["pending"] == 1
    assert answer["matched"] + answer["corrected"] + answer["unchanged"] == 1
    waiting = direct(engine, "SELECT pid FROM pending_labels WHERE model_id = ?", model.id)
    assert waiting == [("order-never-sent",)]


def test_a_back_fill_before_the_retained_days_is_refused_with_nothing_stored(
    tenant: Tenant, engine: Engine, runner: JobRunner
) -> None:
    model, _ = loaded(tenant, engine, seed=7)
    runner.tick()
    tables = counts(engine, model.id)
    old = START + timedelta(days=3, hours=5)
    new = NOW - timedelta(days=2)
    fresh = {"id": "late-new", "ts": stamp(new), "score": 0.4, "tags": {"region": "east"}}
    backfill = {"id": "late-old", "ts": stamp(old), "score": 0.7, "tags": {"region": "east"}}
    # small batches go through the group writer; 300 take the bulk path
    bulky = [{**fresh, "id": f"late-{k}"} for k in range(299)]
    for batch, index in (([fresh, fresh, backfill], 2), ([*bulky, backfill], 299)):
        r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
        assert r.status_code == 422, r.text
        problem = r.json()
        assert problem["errors"][0]["index"] == index
        assert problem["errors"][0]["field"] == "ts"
        since = datetime.fromtimestamp(FIRST_KEPT * 3600, UTC).date()
        assert since.isoformat() in problem["errors"][0]["reason"]
        assert counts(engine, model.id) == tables
    # a back-fill of a retained day is taken as ever
    assert send(tenant.client, model.name, "predictions", [fresh])["accepted"] == 1


def test_erasing_a_dropped_id_reports_it_expired_and_forgets_it(
    tenant: Tenant, engine: Engine, runner: JobRunner
) -> None:
    model, preds = loaded(tenant, engine, seed=8)
    runner.tick()
    gone = next(p["id"] for p in preds if FIRST_KEPT - KEEP * 24 <= hour_of(p) < FIRST_KEPT)
    r = tenant.client.request(
        "DELETE", f"/v1/models/{model.name}/predictions", json={"ids": [gone, "order-unknown"]}
    )
    assert r.status_code == 200, r.text
    assert r.json()["expired"] == [gone]
    assert r.json()["not_found"] == ["order-unknown"]
    assert direct(engine, "SELECT count(*) FROM dropped_ids WHERE pid = ?", gone) == [(0,)]
    # nothing of it is left to name it: a label for it now waits like any unknown id
    answer = send(tenant.client, model.name, "labels", [{"id": gone, "actual": "1"}])
    assert answer["pending"] == 1 and answer["expired"] == 0


def test_a_day_with_outstanding_work_is_not_dropped_until_refreshed(
    tenant: Tenant, engine: Engine, runner: JobRunner
) -> None:
    model, preds = loaded(tenant, engine, seed=9)
    # a correction of day 10, not yet folded in: days from day 10 on must wait
    day10 = next(p for p in preds if START + timedelta(days=10) <= datetime.fromisoformat(p["ts"]))
    for actual in ("1", "0"):  # at least one of the two changes its label
        send(tenant.client, model.name, "labels", [{"id": day10["id"], "actual": actual}])
    assert direct(engine, "SELECT count(*) FROM label_changes WHERE model_id = ?", model.id)[0][0]
    sessions = make_sessionmaker(engine)
    answer = steps.retention_step(runner)
    day10_start = hour_of(day10) // 24 * 24
    (first,) = direct(engine, "SELECT raw_from_hour FROM models WHERE id = ?", model.id)
    assert first == (day10_start,)
    assert answer["rows"] == len([p for p in preds if hour_of(p) < day10_start])
    assert direct(
        engine,
        "SELECT count(*) FROM predictions WHERE model_id = ? AND hour >= ? AND hour < ?",
        model.id,
        day10_start,
        FIRST_KEPT,
    )[0][0] == len([p for p in preds if day10_start <= hour_of(p) < FIRST_KEPT])
    refresh.refresh_all(sessions, max_values=100)
    steps.retention_step(runner)
    (first,) = direct(engine, "SELECT raw_from_hour FROM models WHERE id = ?", model.id)
    assert first == (FIRST_KEPT,)
