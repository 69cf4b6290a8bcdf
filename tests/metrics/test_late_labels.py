"""Windows as labels arrive late, get corrected, and predictions cross negative_after_days.

Each state is checked against scikit-learn on the rows as they stand (see datasets.py). Also:
read-your-writes with the jobs off, dirty marks renewed during a refresh, and a pending label
left behind by a concurrent write, joined by the refresh sweep.
"""

from __future__ import annotations

import threading
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import timedelta
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine, event, text

from belated.clock import clock
from belated.ingest.validate import LabelIn, PredictionIn
from belated.store import dirty, labels, predictions, refresh, rollups
from belated.store.db import is_sqlite, transaction
from tests.conftest import Tenant
from tests.support import count, create_model, rows, send, stamp, wait_until
from tests.support.datasets import (
    NOW,
    START,
    STEPS,
    at,
    breast_cancer,
    check_window,
    effective,
    epoch,
    in_range,
    metrics,
    window_starts,
)

SETTINGS = {"label_delay_days": 14, "min_coverage": 0.8}
RANGE = (START, START + timedelta(days=25))


@contextmanager
def _transactions_begun(engine: Engine) -> Iterator[Counter[str]]:
    """Count SQLite's BEGIN IMMEDIATE (which takes the write lock) as sent ("asked") and as
    returned ("begun") while the block runs."""
    seen: Counter[str] = Counter()

    def asked(*args: Any) -> None:
        if args[2] == "BEGIN IMMEDIATE":
            seen["asked"] += 1

    def begun(*args: Any) -> None:
        if args[2] == "BEGIN IMMEDIATE":
            seen["begun"] += 1

    event.listen(engine, "before_cursor_execute", asked)
    event.listen(engine, "after_cursor_execute", begun)
    try:
        yield seen
    finally:
        event.remove(engine, "before_cursor_execute", asked)
        event.remove(engine, "after_cursor_execute", begun)


def _a_writer_waits(engine: Engine, seen: Counter[str]) -> bool:
    """A transaction is blocked on a lock another one holds: on SQLite one asked for since the
    count started and not yet begun; on PostgreSQL a backend of this database waiting on a
    lock (pg_stat_activity)."""
    if is_sqlite(engine):
        return seen["asked"] > seen["begun"]
    with engine.connect() as conn:
        waiting = conn.execute(
            text(
                "SELECT count(*) FROM pg_stat_activity"
                " WHERE datname = current_database() AND wait_event_type = 'Lock'"
            )
        ).scalar_one()
    return int(waiting) > 0


def check_days(
    tenant: Tenant,
    model: str,
    sc: Any,
    sent: np.ndarray,
    labelled: np.ndarray,
    y: np.ndarray,
    implied: np.ndarray,
    full: bool = False,
) -> list[dict[str, Any]]:
    """Daily windows of RANGE against the reference on the rows sent so far."""
    answer = metrics(tenant.client, model, start=stamp(RANGE[0]), end=stamp(RANGE[1]))
    for w, s in zip(answer["windows"], window_starts("day", *RANGE), strict=True):
        check_window(
            w, sc, sent & in_range(sc.ts, s, s + STEPS["day"]), labelled, y, implied, full=full
        )
    return answer["windows"]


def test_late_labels_and_corrections_change_windows_correctly(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    t1 = START + timedelta(days=12)
    clock.set(t1)
    sent = sc.ts <= epoch(t1)  # predictions arrive as they are made
    send(tenant.client, model.name, "predictions", sc.prediction_items(np.flatnonzero(sent)))
    send(tenant.client, model.name, "labels", sc.label_items(sc.known(t1)))
    first = check_days(tenant, model.name, sc, sent, *effective(sc, t1))

    clock.set(NOW)
    send(tenant.client, model.name, "predictions", sc.prediction_items(np.flatnonzero(~sent)))
    rng = np.random.default_rng(11)
    flipped = rng.choice(np.flatnonzero(sc.known(t1)), 30, replace=False)
    corrected = sc.actual.copy()
    corrected[flipped] = 1 - corrected[flipped]
    late = sc.known(NOW, after=t1)
    answer = send(tenant.client, model.name, "labels", sc.label_items(late))
    assert answer["matched"] == int(late.sum())
    fixes = [
        {
            "id": sc.pids[i],
            "actual": str(int(corrected[i])),
            "ts": stamp(at(sc.label_at[i]) + timedelta(hours=1)),
        }
        for i in flipped
    ]
    assert send(tenant.client, model.name, "labels", fixes)["corrected"] == len(flipped)
    everything = np.ones(len(sc.pids), bool)
    second = check_days(tenant, model.name, sc, everything, *effective(sc, NOW, actual=corrected))
    changed = [
        a["start"]
        for a, b in zip(first, second, strict=True)
        if a["confusion"] != b["confusion"] and a["predictions"] == b["predictions"]
    ]
    assert changed  # windows complete at t1 still changed: late labels and corrections


def test_predictions_crossing_negative_after_days_become_implied_negatives(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, negative_after_days=10, **SETTINGS)
    t1 = START + timedelta(days=26)
    clock.set(t1)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    known_t1 = sc.known(t1)
    send(tenant.client, model.name, "labels", sc.label_items(known_t1))
    before = check_days(
        tenant,
        model.name,
        sc,
        np.ones(len(sc.pids), bool),
        *effective(sc, t1, negative_after_days=10),
    )
    assert sum(w["implied_negatives"] for w in before) > 0

    clock.set(NOW)  # four days later, without any write: more rows cross the ten days
    refresh.join_and_mark(sessions)  # the job's step that marks the hours that crossed
    everything = np.ones(len(sc.pids), bool)
    after = check_days(
        tenant,
        model.name,
        sc,
        everything,
        *effective(sc, NOW, known=known_t1, negative_after_days=10),
    )
    assert sum(w["implied_negatives"] for w in after) > sum(w["implied_negatives"] for w in before)

    # explicit labels that arrive late replace the implied negatives they meet
    late = sc.known(NOW, after=t1)
    implied_then = effective(sc, NOW, known=known_t1, negative_after_days=10)[2]
    assert (late & implied_then & (sc.actual == 1)).any()
    send(tenant.client, model.name, "labels", sc.label_items(late))
    check_days(
        tenant, model.name, sc, everything, *effective(sc, NOW, negative_after_days=10), full=True
    )


def _dirty_hours(engine: Engine, model_id: int) -> dict[int, int]:
    return {
        int(h): int(v)
        for h, v in rows(
            engine, "SELECT hour, seq FROM dirty_buckets WHERE model_id = :m", m=model_id
        )
    }


def test_a_read_right_after_ingest_reflects_it_with_jobs_off(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    send(tenant.client, model.name, "labels", sc.label_items(sc.known(NOW)))
    hours = sorted(_dirty_hours(engine, model.id))
    assert len(hours) == len({int(t // 3600) for t in sc.ts})
    start, end = START, START + timedelta(days=5)
    answer = metrics(tenant.client, model.name, start=stamp(start), end=stamp(end))
    labelled, y, implied = effective(sc, NOW)
    for w, s in zip(answer["windows"], window_starts("day", start, end), strict=True):
        check_window(w, sc, in_range(sc.ts, s, s + STEPS["day"]), labelled, y, implied)
    cut = int(epoch(end) // 3600)
    left = sorted(_dirty_hours(engine, model.id))
    assert [h for h in left if h < cut] == []  # the range read refreshed its buckets ...
    assert left == [h for h in hours if h >= cut]  # ... and only those (jobs are off)

    # a correction is visible to the very next read
    i = int(np.flatnonzero(sc.known(NOW) & in_range(sc.ts, start, end))[0])
    flipped = sc.actual.copy()
    flipped[i] = 1 - flipped[i]
    send(tenant.client, model.name, "labels", [{"id": sc.pids[i], "actual": str(flipped[i])}])
    day = [
        s
        for s in window_starts("day", start, end)
        if in_range(sc.ts[i : i + 1], s, s + STEPS["day"])[0]
    ][0]
    w = metrics(tenant.client, model.name, start=stamp(day), end=stamp(day + STEPS["day"]))
    check_window(
        w["windows"][0],
        sc,
        in_range(sc.ts, day, day + STEPS["day"]),
        *effective(sc, NOW, actual=flipped),
    )


def test_a_mark_renewed_inside_the_refresh_keeps_it_dirty(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    marks = _dirty_hours(engine, model.id)
    renewed = sorted(marks)[3]
    real = rollups.refresh_hours

    def refresh_then_write(**kwargs: Any) -> int:
        done = real(**kwargs)
        # a write to one bucket after the refresh read it, before the marks are cleared
        dirty.mark(session=kwargs["session"], model_id=model.id, hours=[renewed])
        return done

    monkeypatch.setattr(rollups, "refresh_hours", refresh_then_write)
    batch = sorted(marks)[: refresh.BATCH_HOURS]  # one batch: the earliest hours
    with transaction(sessions) as session:
        assert len(refresh.refresh_batch(session, max_values=100, model_id=model.id)) == len(batch)
    left = _dirty_hours(engine, model.id)
    assert sorted(left) == sorted({renewed} | set(marks) - set(batch))
    assert left[renewed] != marks[renewed]  # the write's mark, not the one the refresh read


def test_a_write_during_a_refresh_keeps_its_mark_and_shows_next_read(
    tenant: Tenant, engine: Engine, sessions: Any, frozen: None, monkeypatch: pytest.MonkeyPatch
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, **SETTINGS)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    hour = sorted(_dirty_hours(engine, model.id))[0]
    late = {"id": "written-during-refresh", "ts": stamp(at(hour * 3600 + 59)), "score": 0.9}
    real = rollups.refresh_hours
    writer: list[threading.Thread] = []

    def refresh_while_writing(**kwargs: Any) -> int:
        done = real(**kwargs)
        with _transactions_begun(engine) as begun:
            thread = threading.Thread(
                target=send, args=(tenant.client, model.name, "predictions", [late])
            )
            thread.start()
            writer.append(thread)
            # the writer waits for the refresh's transaction: seen waiting for the lock
            wait_until(
                lambda: _a_writer_waits(engine, begun), 30, what="the writer waiting for the lock"
            )
        assert thread.is_alive()
        return done

    monkeypatch.setattr(rollups, "refresh_hours", refresh_while_writing)
    with transaction(sessions) as session:
        refresh.refresh_batch(session, max_values=100, model_id=model.id)
    monkeypatch.undo()
    writer[0].join(timeout=30)
    assert not writer[0].is_alive()
    marks = _dirty_hours(engine, model.id)
    assert hour in marks  # the write's mark survived the refresh that ran beside it
    assert sorted(marks)[1:] == sorted({int(t // 3600) for t in sc.ts})[refresh.BATCH_HOURS :]
    start = at(hour * 3600)
    answer = metrics(
        tenant.client,
        model.name,
        granularity="hour",
        start=stamp(start),
        end=stamp(start + STEPS["hour"]),
    )
    assert (
        answer["windows"][0]["predictions"]
        == int(in_range(sc.ts, start, start + STEPS["hour"]).sum()) + 1
    )
    assert hour not in _dirty_hours(engine, model.id)


RACED_TS = START + timedelta(days=3, minutes=7)


def leave_a_raced_label(engine: Engine, sessions: Any, store_url: str, model_id: int) -> None:
    """A label and its prediction written in concurrent transactions: the label pending."""
    pred = PredictionIn("raced-1", RACED_TS, 0.8, None, "1", None)
    if store_url.startswith("postgresql"):
        # the label's transaction is open while the prediction's commits: neither sees
        # the other, so the label stays pending beside its prediction
        label_tx = sessions()
        labels.ingest(
            session=label_tx,
            model_id=model_id,
            items=[LabelIn("raced-1", "1", RACED_TS + timedelta(hours=5))],
        )
        with transaction(sessions) as session:
            predictions.ingest(session=session, model_id=model_id, preds=[pred], batch_size=1)
        label_tx.commit()
        label_tx.close()
    else:
        # SQLite runs one writer at a time, so the race cannot happen; write the state it
        # would leave behind directly
        with transaction(sessions) as session:
            predictions.ingest(session=session, model_id=model_id, preds=[pred], batch_size=1)
        with engine.begin() as conn:
            conn.execute(
                text(
                    "INSERT INTO pending_labels (model_id, pid, actual, ts,"
                    " received_at) VALUES (:m, 'raced-1', '1', :t, :t)"
                ),
                {"m": model_id, "t": RACED_TS + timedelta(hours=5)},
            )
    assert count(engine, "pending_labels", model_id) == 1
    assert (
        rows(engine, "SELECT actual FROM predictions WHERE model_id = :m", m=model_id)[0][0] is None
    )


def _raced_day(tenant: Tenant, model: str) -> dict[str, Any]:
    day = RACED_TS.replace(hour=0, minute=0)
    return metrics(tenant.client, model, start=stamp(day), end=stamp(day + STEPS["day"]))[
        "windows"
    ][0]


def test_a_pending_label_left_by_a_concurrent_write_is_joined_by_the_sweep(
    tenant: Tenant, engine: Engine, sessions: Any, store_url: str, frozen: None
) -> None:
    model = create_model(tenant, engine, **SETTINGS)
    leave_a_raced_label(engine, sessions, store_url, model.id)
    assert refresh.join_and_mark(sessions) >= 1
    assert count(engine, "pending_labels", model.id) == 0
    window = _raced_day(tenant, model.name)
    assert window["confusion"] == {"tp": 1, "fp": 0, "fn": 0, "tn": 0}
    assert window["labelled"] == 1


def test_a_read_reflects_a_raced_label_without_waiting_for_the_jobs(
    tenant: Tenant, engine: Engine, sessions: Any, store_url: str, frozen: None
) -> None:
    """DESIGN.md: a read refreshes first, "so every answer reflects all data acknowledged
    before the request", and each refresh re-joins pending labels whose prediction arrived."""
    model = create_model(tenant, engine, **SETTINGS)
    leave_a_raced_label(engine, sessions, store_url, model.id)
    window = _raced_day(tenant, model.name)  # jobs are off: only the read can join it
    assert window["labelled"] == 1, window


def test_a_read_counts_implied_negatives_as_of_its_own_time(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    """DESIGN.md: a read refreshes what it covers first, and each refresh marks the buckets
    whose predictions have just crossed negative_after_days; with the jobs off nothing else
    will, so the read must."""
    sc = breast_cancer()
    model = create_model(tenant, engine, negative_after_days=10, **SETTINGS)
    t1 = START + timedelta(days=26)
    clock.set(t1)
    send(tenant.client, model.name, "predictions", sc.prediction_items())
    known_t1 = sc.known(t1)
    send(tenant.client, model.name, "labels", sc.label_items(known_t1))
    check_days(
        tenant,
        model.name,
        sc,
        np.ones(len(sc.pids), bool),
        *effective(sc, t1, negative_after_days=10),
    )
    clock.set(NOW)  # no write, no job: only time passes
    windows = metrics(tenant.client, model.name, start=stamp(RANGE[0]), end=stamp(RANGE[1]))[
        "windows"
    ]
    implied = effective(sc, NOW, known=known_t1, negative_after_days=10)[2]
    assert sum(w["implied_negatives"] for w in windows) == int(implied.sum())
