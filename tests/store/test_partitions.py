"""The day-partitioned layout of PostgreSQL (store/partitions.py), and what both stores
must answer alike: an id is stored once whatever time it is re-sent with, rows live in the
partition of their day, rows that landed in the default partition are moved out by the jobs,
and the migration from the flat table keeps every row and every window.

Reference: the row counts and rows are read back with SQL; the windows before and after the
migration are compared field by field (the same data, so they must be equal exactly).
"""

from __future__ import annotations

from datetime import timedelta
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from belated.app import create_app
from belated.clock import clock
from belated.config import Settings
from belated.store import partitions, refresh
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.migrate import downgrade, upgrade
from tests.conftest import (
    STORES,
    Tenant,
    create_pg_database,
    drop_pg_database,
    make_tenant,
    pg_url,
)
from tests.support import (
    base_time,
    count,
    create_model,
    epoch_hour,
    label,
    prediction,
    predictions,
    rows,
    send,
    stamp,
)


def probes_by_id(plan: str) -> bool:
    """Whether an EXPLAIN output has the batch's id (`k.pid`) as an index key."""
    return any("Index Cond" in ln and "k.pid" in ln for ln in plan.splitlines())


def stage_labels(session: Any, items: list[tuple[str, str, Any]]) -> None:
    """Stage a labels batch (id, actual, time) as the set path does (PostgreSQL)."""
    from belated.store import bulk, labels

    bulk.temp_table(session, labels._IN_STAGE, labels._IN_STAGE_DDL)
    bulk.copy_rows(
        session,
        labels._IN_STAGE,
        ("pid", "actual", "ts"),
        items,
        types=("text", "text", "timestamptz"),
    )


def post(tenant: Tenant, name: str, items: list[dict[str, Any]]) -> Any:
    """POST a predictions batch."""
    return tenant.client.post(f"/v1/models/{name}/predictions", json={"predictions": items})


@pytest.mark.parametrize("size", [1, 20, 300, 1500])  # small, grouped, staged, COPY paths
def test_an_id_resent_with_another_time_is_never_stored_twice(
    tenant: Tenant, engine: Engine, size: int
) -> None:
    model = create_model(tenant, engine)
    base = base_time()
    first = prediction(0, base=base)
    assert post(tenant, model.name, [first]).json() == {"accepted": 1, "duplicates": 0}
    for shift in (timedelta(days=1), -timedelta(days=365), timedelta(hours=30)):
        moved = dict(first, ts=stamp(base + shift))
        others = predictions(size - 1, start=1000, base=base + shift) if size > 1 else []
        r = post(tenant, model.name, [*others, moved])
        assert r.status_code == 409, r.text
        assert r.json()["ids"] == [first["id"]]
    # nothing of the refused batches, and the first row as it was
    assert count(engine, "predictions", model.id) == 1
    (hour,) = rows(engine, "SELECT hour FROM predictions WHERE model_id = :m", m=model.id)[0]
    assert hour == epoch_hour(base)
    # the same content again is a duplicate, never a second row
    assert post(tenant, model.name, [first]).json() == {"accepted": 0, "duplicates": 1}
    assert count(engine, "predictions", model.id) == 1


def _where(engine: Engine, model_id: int) -> dict[str, str]:
    """Each prediction's id → the table that holds it (SQLite has one)."""
    table = "'predictions'" if engine.dialect.name == "sqlite" else "tableoid::regclass::text"
    return {
        pid: name
        for pid, name in rows(
            engine, f"SELECT pid, {table} FROM predictions WHERE model_id = :m", m=model_id
        )
    }


def _home(engine: Engine, day: int) -> str:
    """The table that must hold a prediction of `day`: its day partition on PostgreSQL."""
    return "predictions" if engine.dialect.name == "sqlite" else partitions.day_name(day)


def test_rows_live_in_the_partition_of_their_day(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine)
    base = base_time()
    items = [prediction(n, base=base - timedelta(days=n * 17)) for n in range(6)]
    send(tenant.client, model.name, "predictions", items)
    where = _where(engine, model.id)
    for n, item in enumerate(items):
        day = epoch_hour(base - timedelta(days=n * 17) + timedelta(minutes=n)) // 24
        assert where[item["id"]] == _home(engine, day)
    if engine.dialect.name == "postgresql":  # one registry row per stored prediction
        registry = rows(
            engine, "SELECT pid, hour FROM prediction_ids WHERE model_id = :m", m=model.id
        )
        assert sorted(map(tuple, registry)) == sorted(
            map(
                tuple,
                rows(engine, "SELECT pid, hour FROM predictions WHERE model_id = :m", m=model.id),
            )
        )


def test_rows_in_the_default_partition_are_moved_out_by_the_jobs(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    model = create_model(tenant, engine)
    when = base_time() - timedelta(days=2000)  # a day no test has given a partition
    day = epoch_hour(when) // 24
    # as if creating the partition had failed: the process believes the day has one
    partitions._known.setdefault(partitions._key(engine), set()).add(day)
    items = predictions(3, base=when, prefix="late")
    send(tenant.client, model.name, "predictions", items)
    pg = engine.dialect.name == "postgresql"
    assert set(_where(engine, model.id).values()) == {partitions.DEFAULT if pg else "predictions"}
    with transaction(sessions) as session:
        done = partitions.maintain(session, clock.now())
    assert done["created"] >= 1 if pg else done["created"] == 0
    assert set(_where(engine, model.id).values()) == {_home(engine, day)}
    assert count(engine, "predictions", model.id) == 3
    # the moved rows are found by id as before
    answer = send(tenant.client, model.name, "labels", [label(i["id"], 1) for i in items])
    assert answer["matched"] == 3


def _snapshot(url: str, model_id: int) -> dict[str, Any]:
    """Every prediction row and every rollup row of the model, read with SQL."""
    engine = make_engine(url)
    try:
        preds = rows(
            engine,
            "SELECT row_id, pid, ts, hour, score, predicted, actual, label_ts, delay_h"
            " FROM predictions WHERE model_id = :m ORDER BY row_id",
            m=model_id,
        )
        return {
            "predictions": [tuple(r) for r in preds],
            "rollups": [
                tuple(r)
                for r in rows(
                    engine,
                    "SELECT * FROM rollups WHERE model_id = :m"
                    " ORDER BY level, start, seg_key, seg_value",
                    m=model_id,
                )
            ],
        }
    finally:
        engine.dispose()


def _windows(url: str, name: str, project_tokens: dict[str, str]) -> list[dict[str, Any]]:
    """The model's daily windows over HTTP."""
    settings = Settings(database_url=url, jobs=False)
    engine = make_engine(url)
    try:
        with TestClient(create_app(settings, engine=engine, jobs=False)) as client:
            client.headers["Authorization"] = f"Bearer {project_tokens['read']}"
            r = client.get(
                f"/v1/models/{name}/metrics",
                params={"granularity": "day", "start": "2026-10-01", "end": "2026-10-09"},
            )
            assert r.status_code == 200, r.text
            return list(r.json()["windows"])
    finally:
        engine.dispose()


@pytest.mark.parametrize("kind", STORES)
def test_migration_from_the_flat_table_keeps_every_row_and_window(
    kind: str, tmp_path: Path
) -> None:
    name = None
    if kind == "sqlite":
        url = f"sqlite:///{tmp_path / 'flat.db'}"
    else:
        name = create_pg_database("belated_part")
        url = pg_url(name)
    try:
        upgrade(url, "0018_raw_retention")  # the flat layout, populated through the service
        upgrade(url)
        engine = make_engine(url)
        sessions = make_sessionmaker(engine)
        settings = Settings(database_url=url, jobs=False, max_batch=10_000)
        start = base_time().replace(year=2026, month=10, day=1, hour=0)
        clock.set(start + timedelta(days=12))
        with TestClient(create_app(settings, engine=engine, jobs=False)) as client:
            tenant = make_tenant(sessions, client)
            model = create_model(tenant, engine, label_delay_days=3)
            items = [
                prediction(n, base=start, tags={"region": "north" if n % 3 else "south"})
                for n in range(0, 8 * 24 * 60, 7)
            ]
            send(client, model.name, "predictions", items)
            labels = [label(i["id"], int(float(i["score"]) > 0.4)) for i in items[::2]]
            send(client, model.name, "labels", labels)
            refresh.refresh_all(sessions, max_values=settings.max_segment_values)
        engine.dispose()
        before = _snapshot(url, model.id)
        windows = _windows(url, model.name, tenant.tokens)
        assert len(before["predictions"]) == len(items)
        downgrade(url, "0018_raw_retention")
        assert _snapshot(url, model.id) == before  # the flat table, every row as it was
        upgrade(url)
        assert _snapshot(url, model.id) == before
        assert _windows(url, model.name, tenant.tokens) == windows
        if kind == "postgresql":
            engine = make_engine(url)
            try:
                held = rows(engine, "SELECT DISTINCT tableoid::regclass::text FROM predictions")
                first_day = epoch_hour(start) // 24
                assert {r[0] for r in held} == {
                    partitions.day_name(first_day + d) for d in range(8)
                }
                registry = rows(
                    engine, "SELECT count(*) FROM prediction_ids WHERE model_id = :m", m=model.id
                )
                assert registry[0][0] == len(items)
            finally:
                engine.dispose()
    finally:
        clock.set(None)
        if name is not None:
            drop_pg_database(name)


def test_retention_drops_whole_day_partitions_and_keeps_every_window(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    from belated.store import raw_retention
    from belated.store.tables import ModelRow

    model = create_model(tenant, engine, label_delay_days=1, keep_raw_days=2)
    start = base_time().replace(year=2001, month=3, day=1, hour=0)  # days no other test uses
    items = [prediction(n, base=start, prefix="old") for n in range(0, 5 * 24 * 60, 90)]
    send(tenant.client, model.name, "predictions", items)
    send(tenant.client, model.name, "labels", [label(i["id"], n % 2) for n, i in enumerate(items)])
    refresh.refresh_all(sessions, max_values=100)
    query = {"granularity": "day", "start": "2001-03-01", "end": "2001-03-06"}
    before = tenant.client.get(f"/v1/models/{model.name}/metrics", params=query).json()
    with transaction(sessions) as session:
        row = session.get(ModelRow, model.id)
        assert row is not None
        done = raw_retention.drop_raw_days(
            session=session, model=row, now=start + timedelta(days=10)
        )
    assert done["rows"] == len(items) and done["days"] == 5
    assert count(engine, "predictions", model.id) == 0
    after = tenant.client.get(f"/v1/models/{model.name}/metrics", params=query).json()
    assert after["windows"] == before["windows"]
    if engine.dialect.name == "postgresql":  # the days' partitions are gone, not emptied
        first = epoch_hour(start) // 24
        for day in range(first, first + 5):
            assert rows(engine, f"SELECT to_regclass('{partitions.day_name(day)}')")[0][0] is None
        left = rows(engine, "SELECT count(*) FROM prediction_ids WHERE model_id = :m", m=model.id)
        assert left[0][0] == 0


def _young_day(
    tenant: Tenant, model: str, days_back: int, n: int, prefix: str
) -> tuple[Any, list[dict[str, Any]]]:
    """Send n predictions in one hour of a day of their own, `days_back` before the test
    time: its partition is created now and has no statistics, as a live system's young
    day. Answers the day's start and the predictions."""
    when = (base_time() - timedelta(days=days_back)).replace(
        hour=0, minute=0, second=0, microsecond=0
    )
    items = [
        {**prediction(i, prefix=prefix), "ts": stamp(when + timedelta(milliseconds=250 * i))}
        for i in range(n)
    ]
    for start in range(0, n, 1000):
        send(tenant.client, model, "predictions", items[start : start + 1000])
    return when, items


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)  # its layout alone
def test_label_writes_fetch_the_locked_rows_by_address_and_probe_the_id_index(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """Common practice (PostgreSQL's planner): a day partition filled minutes ago has no
    column statistics, and a join of the batch's rows to it was planned as a scan of the
    day (measured: 4.8 ms to update 20 rows of 20,000). The update of the locked rows must
    fetch them by address (a TID scan, whatever the statistics); the locked read must probe
    the (model, id, hour) index once per id, before the day has statistics and after.
    Without the address the join was planned as a scan of the day; with the hour as an index
    key the read took the (model, hour) index before the day was analysed."""
    from belated.store import by_day, labels

    model = create_model(tenant, engine)
    when, items = _young_day(tenant, model.name, 1500, 12_000, "young")
    day = partitions.day_name(epoch_hour(when) // 24)
    ids = [i["id"] for i in items[::600]]
    with transaction(sessions) as session:
        where = by_day.hours(session, model.id, ids)
        assert len(where) == len(ids)
        ctes, union, params = by_day.read_sql(
            by_day.group(session, where), labels._TARGET_COLUMNS, lock=True, hours=where
        )
        read = f"WITH {', '.join(ctes)} {union}"
        raw = session.connection().connection.driver_connection
        with raw.cursor() as cur:
            # without statistics the (model, hour) index looked as cheap, and read the
            # hour's 12,000 rows for each id (0.7 to 1.7 s for 20 labels in bench/live.py)
            plan = "\n".join(
                r[0] for r in cur.execute(f"EXPLAIN {read}", {"m": model.id, **params})
            )
            assert "model_id_pid_hour" in plan and "model_id_hour_idx" not in plan, plan
            found = cur.execute(read, {"m": model.id, **params}).fetchall()
            assert sorted(r[0] for r in found) == sorted(ids)
            # a day holding one id of the batch is probed by equality: the same index
            one = ids[3]
            c1, u1, p1 = by_day.read_sql(
                {day: [one]}, labels._TARGET_COLUMNS, lock=True, hours={one: where[one]}
            )
            single = f"WITH {', '.join(c1)} {u1}"
            plan = "\n".join(r[0] for r in cur.execute(f"EXPLAIN {single}", {"m": model.id, **p1}))
            assert "model_id_pid_hour" in plan and "model_id_hour_idx" not in plan, plan
            (alone,) = cur.execute(single, {"m": model.id, **p1}).fetchall()
            assert alone == next(r for r in found if r[0] == one)
            source = (
                "(SELECT * FROM unnest(%(row)s::int8[], %(hour)s::int4[], %(a)s::text[],"
                " %(ts)s::timestamptz[], %(d)s::float8[]) AS v(row_id, hour, actual, label_ts,"
                " delay_h))"
            )
            upd = by_day.update_sql(session, (r[3] for r in found), source, at="at")
            values = {
                "row": [r[1] for r in found],
                "hour": [r[3] for r in found],
                "a": ["1"] * len(found),
                "ts": [r[2] for r in found],
                "d": [1.0] * len(found),
                "at": [r[-1] for r in found],
            }
            plan = "\n".join(
                r[0] for r in cur.execute(f"EXPLAIN WITH {', '.join(upd)} SELECT 1", values)
            )
            # by address, or one probe of the primary key per row: never the whole day
            assert "Tid Scan" in plan or "_pkey" in plan, plan
            assert "Seq Scan" not in plan and "Bitmap" not in plan, plan
            cur.execute(f"WITH {', '.join(upd)} SELECT 1", values)
            assert cur.execute(
                "SELECT count(*) FROM predictions WHERE model_id = %s AND actual = '1'",
                (model.id,),
            ).fetchone() == (len(ids),)
            cur.execute(f"ANALYZE {day}")
            plan = "\n".join(
                r[0] for r in cur.execute(f"EXPLAIN {read}", {"m": model.id, **params})
            )
            assert "model_id_pid_hour" in plan, plan
            assert "Seq Scan" not in plan and "Bitmap" not in plan, plan
        session.rollback()


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_the_label_look_up_locks_each_row_in_its_own_table_by_id(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """The labels path finds its predictions with one call of `label_targets` (migration
    0022): each id's hour from the registry, then its day's partition by name (the default
    partition for a day without one), rows locked in table then id order, the order every
    other statement that locks predictions by id keeps (store/by_day.py). A young day has
    no statistics: the rows must still be found by the id index, not by reading the hour
    (common practice: pg_stat_xact_user_tables counts this transaction's reads)."""
    import psycopg

    from belated.store import labels

    model = create_model(tenant, engine)
    when, young = _young_day(tenant, model.name, 1600, 6000, "Young")
    stray_when = base_time() - timedelta(days=2100)  # a day without a partition
    stray_day = epoch_hour(stray_when) // 24
    partitions._known.setdefault(partitions._key(engine), set()).add(stray_day)
    stray = predictions(3, base=stray_when, prefix="stray-")
    send(tenant.client, model.name, "predictions", stray)
    others = [prediction(n, base=base_time() - timedelta(days=n * 9), prefix="o_") for n in (2, 3)]
    send(tenant.client, model.name, "predictions", others)
    ids = [i["id"] for i in young[::500]] + [i["id"] for i in stray + others] + ["absent"]
    day = partitions.day_name(epoch_hour(when) // 24)
    with transaction(sessions) as session:
        raw = session.connection().connection.driver_connection
        reads = "SELECT seq_scan, idx_tup_fetch FROM pg_stat_xact_user_tables WHERE relname = %s"
        with raw.cursor() as cur:  # reads not yet reported count too: the difference
            seq0, fetched0 = cur.execute(reads, (day,)).fetchone()
        found = labels._targets(session, model.id, ids)
        with raw.cursor() as cur:
            seq1, fetched1 = cur.execute(reads, (day,)).fetchone()
            seq, fetched = seq1 - seq0, fetched1 - fetched0
            order = [
                (r[-1], r[0]) for r in cur.execute(labels._TARGETS_SQL, {"m": model.id, "ids": ids})
            ]
        assert set(found) == set(ids) - {"absent"}
        where = _where(engine, model.id)
        for pid, stored in found.items():
            assert stored.table == where[pid], pid
        assert {found[i["id"]].table for i in stray} == {partitions.DEFAULT}
        # the young day: one index fetch per id, no scan of the hour's 6,000 rows
        assert seq == 0 and fetched == len(young[::500]), (seq, fetched)
        # locked: another connection cannot take these rows meanwhile
        plain_url = pg_url(str(engine.url.database)).replace("+psycopg", "")
        with psycopg.connect(plain_url, autocommit=True) as other:
            for pid in (young[0]["id"], stray[1]["id"], others[0]["id"]):
                with pytest.raises(psycopg.errors.LockNotAvailable):
                    other.execute(
                        "SELECT 1 FROM predictions WHERE model_id = %s AND pid = %s"
                        " FOR UPDATE NOWAIT",
                        (model.id, pid),
                    )
        # tables, then ids, in code-point order (Python's sort, the other lockers' order)
        assert order == sorted(order)
        session.rollback()
    answer = send(tenant.client, model.name, "labels", [label(i, 1) for i in ids])
    assert answer["matched"] == len(ids) - 1 and answer["pending"] == 1
    assert count(engine, "predictions", model.id, "actual = '1'") == len(ids) - 1


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_a_label_leaves_its_prediction_on_its_page(tenant: Tenant, engine: Engine) -> None:
    """Common practice (PostgreSQL heap-only tuples): an update whose new row version fits
    on the page of the old one touches no index. The day partitions leave a fifth of each
    page free (the migration sets it on the default partition and every existing day, new
    days are created with it), so a label's update keeps each prediction on its page;
    on pages filled to the brim (PostgreSQL's default) every one of these rows moved."""
    model = create_model(tenant, engine)
    when = base_time() - timedelta(days=1400)
    when = when.replace(hour=0, minute=0, second=0, microsecond=0)
    items = [
        {**prediction(i, prefix="page"), "ts": stamp(when + timedelta(seconds=i))}
        for i in range(3000)
    ]
    for start in range(0, len(items), 1000):
        send(tenant.client, model.name, "predictions", items[start : start + 1000])
    ids = [i["id"] for i in items[::6]]
    block_sql = (
        "SELECT pid, (ctid::text::point)[0] FROM predictions WHERE model_id = %(m)s"
        " AND pid = ANY(%(ids)s)"
    )
    with engine.connect() as conn:
        before = dict(conn.exec_driver_sql(block_sql, {"m": model.id, "ids": ids}).all())
    assert len(before) == len(ids)
    for start in range(0, len(ids), 20):  # the small path of a live system
        send(tenant.client, model.name, "labels", [label(p, 1) for p in ids[start : start + 20]])
    with engine.connect() as conn:
        after = dict(conn.exec_driver_sql(block_sql, {"m": model.id, "ids": ids}).all())
        labelled = conn.exec_driver_sql(
            "SELECT count(*) FROM predictions WHERE model_id = %(m)s AND actual = '1'",
            {"m": model.id},
        ).scalar()
        options = conn.exec_driver_sql(
            "SELECT c.relname, c.reloptions FROM pg_inherits i JOIN pg_class c"
            " ON c.oid = i.inhrelid WHERE i.inhparent = 'predictions'::regclass"
        ).all()
    assert labelled == len(ids)
    moved = [p for p in ids if after[p] != before[p]]
    assert not moved, f"{len(moved)} of {len(ids)} rows left their page"
    assert {n for n, _ in options} >= {
        partitions.DEFAULT,
        partitions.day_name(epoch_hour(when) // 24),
    }
    for name, opts in options:
        assert f"fillfactor={partitions.FILLFACTOR}" in (opts or []), (name, opts)


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_pending_labels_are_probed_by_id_however_many_wait(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """Common practice (PostgreSQL's planner): `pid = ANY(ids)` with the ids as text[]
    against the varchar column read all of the model's pending labels (9.9 ms a look-up
    with 30,000 of them, measured in bench/live.py). The look-up of pending labels and the
    drop of those a matched label replaces must probe the (model, id) index per id."""
    from belated.store import labels

    model = create_model(tenant, engine)
    waiting = [label(f"early-{i}", i % 2) for i in range(12_000)]
    for start in range(0, len(waiting), 2000):
        send(tenant.client, model.name, "labels", waiting[start : start + 2000])
    ids = [f"early-{i}" for i in range(0, 12_000, 600)]
    with transaction(sessions) as session:
        raw = session.connection().connection.driver_connection
        with raw.cursor() as cur:
            found = cur.execute(labels._PENDING_PROBE, {"ids": ids, "m": model.id}).fetchall()
            assert sorted(p for p, _ in found) == sorted(ids)
            plan = "\n".join(
                r[0]
                for r in cur.execute(
                    f"EXPLAIN {labels._PENDING_PROBE}", {"ids": ids, "m": model.id}
                )
            )
            # the id is an index key, not a filter over the model's every pending label
            assert probes_by_id(plan), plan
            assert "Seq Scan" not in plan and "Filter" not in plan, plan
            gone = labels._SMALL_WRITE.split("gone AS (")[1].split("), marks AS")[0]
            plan = "\n".join(
                r[0] for r in cur.execute(f"EXPLAIN {gone}", {"found": ids, "m": model.id})
            )
            assert probes_by_id(plan), plan
            assert "Seq Scan" not in plan, plan
        session.rollback()
    # the pending labels are joined when their predictions arrive, as before
    send(tenant.client, model.name, "predictions", [prediction(0, prefix="early")])
    assert count(engine, "pending_labels", model.id) == 12_000 - 1


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_a_large_label_batch_probes_the_registry_by_id(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """Common practice (PostgreSQL's planner): a join of a staged batch to the id registry
    was planned as a hash of the whole registry (146 ms a batch of 10,000 labels against
    400,000 ids, measured in bench/ingest.py), a cost that grows with the store. The hours of
    a large batch's ids must come from one index probe per id."""
    from belated.store import bulk, labels

    model = create_model(tenant, engine)
    send(tenant.client, model.name, "predictions", predictions(3000, prefix="reg"))
    with engine.begin() as conn:
        conn.exec_driver_sql("ANALYZE prediction_ids")
    with transaction(sessions) as session:
        stage_labels(session, [(f"reg-{i}", "1", base_time()) for i in range(0, 3000, 3)])
        sql = labels._STAGE_REGISTRY_SQL
        assert len(bulk.fetch_all(session, sql, {"m": model.id})) == 1000
        plan = "\n".join(r[0] for r in bulk.fetch_all(session, f"EXPLAIN {sql}", {"m": model.id}))
        assert probes_by_id(plan), plan
        assert "Seq Scan on prediction_ids" not in plan and "Hash" not in plan, plan
        session.rollback()


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_a_large_label_batch_updates_its_rows_by_address_in_every_day(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """Common practice (PostgreSQL's planner): in the one statement that applies a large
    labels batch, the batch's size was overestimated (the staged rows joined to the locked
    reads: 259,200 rows estimated for 10,000) and each day's update became a scan of its
    partition (6 ms a day of 14,000 rows, 60 days a batch in bench/scale.py at 5M
    predictions: a cost that grows with the store). Each day's rows must be fetched by
    address (a TID scan), analysed or not."""
    from belated.store import bulk, labels

    model = create_model(tenant, engine)
    base = (base_time() - timedelta(days=400)).replace(hour=0, minute=0, second=0, microsecond=0)
    items = predictions(2880, base=base)  # two whole days of their own, a minute apart
    for start in range(0, len(items), 960):
        send(tenant.client, model.name, "predictions", items[start : start + 960])
    days = {partitions.day_name(epoch_hour(base) // 24 + d) for d in (0, 1)}
    with engine.begin() as conn:
        for day in days:  # with statistics the seq scan looked cheapest
            conn.exec_driver_sql(f"ANALYZE {day}")
    picked = [p["id"] for p in items[::2]]
    with transaction(sessions) as session:
        stage_labels(session, [(pid, "1", base + timedelta(days=3)) for pid in picked])
        sql, params = labels.set_write(session, model.id, base + timedelta(days=4))
        plan = "\n".join(r[0] for r in bulk.fetch_all(session, f"EXPLAIN {sql}", params))
        assert plan.count("Tid Scan on predictions_p") >= len(days), plan
        assert "Seq Scan on predictions_p" not in plan, plan
        found, matched, corrected, _pending, _hours = bulk.fetch_all(session, sql, params)[0]
        assert (found, matched + corrected) == (len(picked), len(picked))
        session.rollback()


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_the_fold_joins_each_day_partition_and_reads_rollups_by_a_range_of_hours(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """Common practice (PostgreSQL's planner): the fold of label changes joined each change
    to `predictions` through the parent, paying the run-time choice of a partition per
    change (about 30 µs against 2 µs for the partition's own key, bench/scale.py at 5M
    predictions), and the reads and deletes of rollups by a list of hours read every row of
    the model's level while rollups had no statistics (70 ms a read at a year of hours).
    The fold must join each day's partition by name, and the rows of the hours must come
    from a bounded index scan without statistics. Its results are checked against a rebuild
    in tests/metrics/test_label_fold.py and test_windows_e2e.py."""
    from belated.store import rollup_sql, rollups
    from belated.store.tables import ModelRow

    model = create_model(tenant, engine)
    base = (base_time() - timedelta(days=20)).replace(hour=0)
    times = [base + timedelta(minutes=37 * i) for i in range(600)]  # 370 hours, 16 days
    items = [dict(prediction(i, base=base), ts=stamp(t)) for i, t in enumerate(times)]
    send(tenant.client, model.name, "predictions", items)
    refresh.refresh_all(sessions, max_values=100)
    send(tenant.client, model.name, "labels", [label(p["id"], "1") for p in items[::3]])
    hours = sorted({epoch_hour(t) for t in times[::3]})
    with transaction(sessions) as session:
        stored = session.get(ModelRow, model.id)
        assert stored is not None
        scope = rollups.scope_of(stored, hours, clock.now()).changes()
        source = rollup_sql._Query(session, scope).source()
        days = {h // 24 for h in hours}
        assert len(days) >= 15
        for day in days:
            assert f"JOIN {partitions.day_name(day)} p " in source, source
        assert "JOIN predictions p " not in source
        raw = session.connection().connection.driver_connection
        assert raw is not None
        params = (model.id, "h", hours[0], hours[-1], hours)
        plan = [r[0] for r in raw.execute("EXPLAIN " + rollups.ROWS_SQL, params)]
        assert any("Index Cond" in ln and "start" in ln for ln in plan), "\n".join(plan)
        assert len(raw.execute(rollups.ROWS_SQL, params).fetchall()) >= len(hours)


@pytest.mark.parametrize("store_url", ["postgresql"], indirect=True)
def test_the_fold_reads_a_day_without_a_partition_through_the_parent(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    """The hours of a day whose rows sit in the default partition are folded through the
    parent: the jobs or a writer may give that day a partition, moving its rows out of the
    default one, between the fold's reading of the catalogue and its statement. The folded
    hourly rows equal those of a rebuild from the raw rows."""
    from belated.store import rollup_sql, rollups
    from belated.store.tables import ModelRow

    model = create_model(tenant, engine)
    when = base_time() - timedelta(days=2100)  # a day no test has given a partition
    # as if creating the partition had failed: the process believes the day has one
    partitions._known.setdefault(partitions._key(engine), set()).add(epoch_hour(when) // 24)
    items = predictions(90, base=when, prefix="dflt")  # an hour and a half
    send(tenant.client, model.name, "predictions", items)
    assert set(_where(engine, model.id).values()) == {partitions.DEFAULT}
    refresh.refresh_all(sessions, max_values=100)
    send(tenant.client, model.name, "labels", [label(p["id"], i % 2) for i, p in enumerate(items)])
    hours = sorted({epoch_hour(when), epoch_hour(when) + 1})
    with transaction(sessions) as session:
        stored = session.get(ModelRow, model.id)
        assert stored is not None
        scope = rollups.scope_of(stored, hours, clock.now()).changes()
        source = rollup_sql._Query(session, scope).source()
        assert "JOIN predictions p " in source and partitions.DEFAULT not in source, source
    counts = (
        "SELECT start, seg_key, seg_value, n_pred, n_labelled, tp, fp, fn, tn FROM rollups"
        " WHERE model_id = :m AND level = 'h' ORDER BY 1, 2, 3"
    )
    refresh.refresh_all(sessions, max_values=100)
    folded = [tuple(r) for r in rows(engine, counts, m=model.id)]
    assert sum(r[4] for r in folded if r[1] == "") == 90  # every label folded in
    refresh.rebuild(sessions, max_values=100, model_id=model.id)
    assert [tuple(r) for r in rows(engine, counts, m=model.id)] == folded
