"""Label ingest: matched, pending, corrected and unchanged; history; default times; dirty hours."""

from __future__ import annotations

from datetime import datetime, timedelta

import pytest
from sqlalchemy import Engine

from belated.timeutil import from_db
from tests.conftest import Tenant
from tests.support import (
    Model,
    base_time,
    count,
    create_model,
    epoch_hour,
    label,
    outcome_of,
    prediction,
    prediction_row,
    predictions,
    rows,
    send,
    utcnow,
)


@pytest.fixture()
def model(tenant: Tenant, engine: Engine) -> Model:
    """A binary model with the default settings."""
    return create_model(tenant, engine)


def history(engine: Engine, model: Model, pid: str) -> list[tuple[str, str]]:
    """The label history of one id, in arrival order."""
    return [
        tuple(r)
        for r in rows(
            engine,
            "SELECT actual, change FROM labels WHERE model_id = :m AND pid = :p ORDER BY row_id",
            m=model.id,
            p=pid,
        )
    ]


def test_the_five_answers_add_up_to_the_batch_size(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    items = predictions(6)
    send(tenant.client, model.name, "predictions", items)
    ids = [p["id"] for p in items]
    send(tenant.client, model.name, "labels", [label(ids[0], "0"), label(ids[1], "1")])
    batch = [
        label(ids[0], "1"),  # corrected
        label(ids[1], "1"),  # unchanged
        label(ids[2], "0"),  # matched
        label(ids[3], "1"),  # matched
        label("order-not-yet", "1"),  # pending
        label(ids[4], 1),  # matched, integer class
        label(ids[4], "1"),  # the same id again in the batch: unchanged
    ]
    answer = send(tenant.client, model.name, "labels", batch)
    assert answer == {"matched": 3, "pending": 1, "corrected": 1, "unchanged": 2, "expired": 0}
    assert sum(answer.values()) == len(batch)
    labelled = rows(
        engine,
        "SELECT pid, actual FROM predictions WHERE model_id = :m"
        " AND actual IS NOT NULL ORDER BY pid",
        m=model.id,
    )
    assert [tuple(r) for r in labelled] == [
        (ids[0], "1"),
        (ids[1], "1"),
        (ids[2], "0"),
        (ids[3], "1"),
        (ids[4], "1"),
    ]
    assert count(engine, "pending_labels", model.id) == 1


def test_corrections_apply_in_arrival_order_and_keep_history(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    item = prediction(0)
    send(tenant.client, model.name, "predictions", [item])
    pid = item["id"]
    known = datetime.fromisoformat(item["ts"]) + timedelta(days=1)
    send(tenant.client, model.name, "labels", [label(pid, "1", ts=known)])
    # a correction whose outcome time is earlier still wins: arrival order decides
    answer = send(
        tenant.client, model.name, "labels", [label(pid, "0", ts=known - timedelta(hours=6))]
    )
    assert answer == {"matched": 0, "pending": 0, "corrected": 1, "unchanged": 0, "expired": 0}
    assert (
        send(tenant.client, model.name, "labels", [label(pid, "1", ts=known + timedelta(hours=2))])[
            "corrected"
        ]
        == 1
    )
    assert history(engine, model, pid) == [("1", "first"), ("0", "correction"), ("1", "correction")]
    row = prediction_row(engine, model.id, pid)
    assert row["actual"] == "1" and row["label_ts"] == known + timedelta(hours=2)
    got = tenant.client.get(f"/v1/models/{model.name}").json()["counts"]
    assert got == {"predictions": 1, "labelled": 1, "pending_labels": 0}


def test_the_same_actual_again_is_unchanged_whatever_its_time(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    item = prediction(0)
    send(tenant.client, model.name, "predictions", [item])
    known = datetime.fromisoformat(item["ts"]) + timedelta(hours=5)
    send(tenant.client, model.name, "labels", [label(item["id"], "1", ts=known)])
    marks = rows(engine, "SELECT hour, seq FROM dirty_buckets WHERE model_id = :m", m=model.id)
    for later in (known + timedelta(days=1), known - timedelta(hours=4), None):
        answer = send(tenant.client, model.name, "labels", [label(item["id"], "1", ts=later)])
        assert answer == {"matched": 0, "pending": 0, "corrected": 0, "unchanged": 1, "expired": 0}
    assert prediction_row(engine, model.id, item["id"])["label_ts"] == known
    assert history(engine, model, item["id"]) == [("1", "first")]
    assert (
        rows(engine, "SELECT hour, seq FROM dirty_buckets WHERE model_id = :m", m=model.id) == marks
    )


def test_a_label_without_time_is_stamped_when_received(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    item = prediction(0)
    send(tenant.client, model.name, "predictions", [item])
    before = utcnow()
    send(tenant.client, model.name, "labels", [label(item["id"], "0"), label("order-waiting", "1")])
    after = utcnow()
    row = prediction_row(engine, model.id, item["id"])
    assert row["label_ts"] is not None and before <= row["label_ts"] <= after
    (pending_ts,) = rows(engine, "SELECT ts FROM pending_labels WHERE model_id = :m", m=model.id)[0]
    stamped = from_db(pending_ts)
    assert stamped is not None and before <= stamped <= after
    expected_delay = (row["label_ts"] - datetime.fromisoformat(item["ts"])).total_seconds()
    (delay_h,) = rows(engine, "SELECT delay_h FROM predictions WHERE model_id = :m", m=model.id)[0]
    assert delay_h == pytest.approx(expected_delay / 3600, abs=1e-6)


def test_a_label_for_an_old_prediction_marks_that_old_hour_dirty(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    old = prediction(0, base=base_time() - timedelta(days=19))  # three weeks before now
    assert utcnow() - datetime.fromisoformat(old["ts"]) >= timedelta(days=21)
    send(tenant.client, model.name, "predictions", [old])
    old_hour = epoch_hour(datetime.fromisoformat(old["ts"]))
    (before,) = rows(
        engine, "SELECT hour, seq, marked_at FROM dirty_buckets WHERE model_id = :m", m=model.id
    )
    assert before[0] == old_hour
    now_hours = {epoch_hour(utcnow())}
    send(tenant.client, model.name, "labels", [label(old["id"], outcome_of(0))])
    now_hours.add(epoch_hour(utcnow()))
    after = rows(
        engine, "SELECT hour, seq, marked_at FROM dirty_buckets WHERE model_id = :m", m=model.id
    )
    assert {r[0] for r in after} == {old_hour}
    assert not now_hours & {r[0] for r in after}
    (again,) = [r for r in after if r[1] != before[1]]  # marked again by a mark of its own
    assert from_db(again[2]) >= from_db(before[2])


def test_a_pending_label_can_be_corrected_before_its_prediction_arrives(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    item = prediction(0)
    assert send(tenant.client, model.name, "labels", [label(item["id"], "1")])["pending"] == 1
    assert send(tenant.client, model.name, "labels", [label(item["id"], "0")])["pending"] == 1
    assert count(engine, "pending_labels", model.id) == 1
    assert history(engine, model, item["id"]) == [("1", "pending"), ("0", "pending")]
    send(tenant.client, model.name, "predictions", [item])
    assert prediction_row(engine, model.id, item["id"])["actual"] == "0"
    assert count(engine, "pending_labels", model.id) == 0


@pytest.mark.parametrize("size", [20, 1500])  # the grouped path and the bulk (COPY) path
def test_labels_waiting_are_joined_when_their_predictions_arrive_in_any_batch_size(
    tenant: Tenant, engine: Engine, model: Model, size: int
) -> None:
    items = predictions(size, base=base_time() - timedelta(days=2))
    early = items[:: max(1, size // 25)]  # labelled before their predictions arrive
    marks = [label(p["id"], outcome_of(i)) for i, p in enumerate(early)]
    assert send(tenant.client, model.name, "labels", marks)["pending"] == len(early)
    send(tenant.client, model.name, "predictions", items)
    assert count(engine, "pending_labels", model.id) == 0
    for i, p in enumerate(early):
        assert prediction_row(engine, model.id, p["id"])["actual"] == outcome_of(i)
    assert count(engine, "predictions", model.id, "actual IS NOT NULL") == len(early)


def test_labels_do_not_cross_models(tenant: Tenant, engine: Engine, model: Model) -> None:
    other = create_model(tenant, engine)
    item = prediction(0)
    send(tenant.client, model.name, "predictions", [item])
    answer = send(tenant.client, other.name, "labels", [label(item["id"], "1")])
    assert answer["pending"] == 1
    assert prediction_row(engine, model.id, item["id"])["actual"] is None
    assert count(engine, "pending_labels", other.id) == 1
    assert count(engine, "pending_labels", model.id) == 0


def label_state(engine: Engine, model: Model) -> dict[str, list[tuple[object, ...]]]:
    """Everything labels write for one model, without row ids and receive times."""
    queries = {
        "predictions": "SELECT pid, actual, label_ts, delay_h FROM predictions"
        " WHERE model_id = :m ORDER BY pid",
        "history": "SELECT pid, actual, ts, change FROM labels WHERE model_id = :m"
        " ORDER BY pid, row_id",
        "pending": "SELECT pid, actual, ts FROM pending_labels WHERE model_id = :m ORDER BY pid",
        "changes": "SELECT p.pid, c.hour, c.old_actual, c.old_delay_h, c.new_actual,"
        " c.new_delay_h FROM label_changes c JOIN predictions p ON p.row_id = c.row_id"
        " WHERE c.model_id = :m ORDER BY p.pid, c.row_id",
    }
    # sorted whole: one id's two changes (first label, then correction) share pid and row
    return {
        name: sorted((tuple(r) for r in rows(engine, sql, m=model.id)), key=repr)
        for name, sql in queries.items()
    }


def test_a_large_batch_decides_exactly_as_small_batches_do(tenant: Tenant, engine: Engine) -> None:
    """Past 1,000 distinct ids PostgreSQL matches labels as sets in one statement; its answers
    and every row it writes equal those of the same labels sent 150 at a time."""
    base = base_time() - timedelta(days=28)
    items = predictions(1600, base=base)
    ids = [p["id"] for p in items]
    first = [label(ids[i], outcome_of(i), base + timedelta(hours=2 + i % 90)) for i in range(600)]
    first += [label(f"early-{i}", "1", base) for i in range(40)]  # pending before the batch
    big = (
        [label(ids[i], outcome_of(i), base + timedelta(days=3)) for i in range(300)]  # unchanged
        + [label(ids[i], "0" if outcome_of(i) == "1" else "1", base) for i in range(300, 600)]
        + [label(ids[i], outcome_of(i), base + timedelta(hours=i % 500)) for i in range(600, 1500)]
        + [label(ids[1500], "1", base - timedelta(hours=5))]  # before its prediction: delay 0
        + [label(f"early-{i}", "1" if i < 20 else "0", base) for i in range(40)]
        + [label(f"never-{i}", "0", base) for i in range(30)]
    )
    answers = []
    models = [create_model(tenant, engine), create_model(tenant, engine)]
    for model, size in zip(models, (len(big), 150), strict=True):
        send(tenant.client, model.name, "predictions", items)
        send(tenant.client, model.name, "labels", first)
        got = [
            send(tenant.client, model.name, "labels", big[i : i + size])
            for i in range(0, len(big), size)
        ]
        answers.append({k: sum(a[k] for a in got) for k in got[0]})
    assert (
        answers[0]
        == answers[1]
        == {
            "matched": 901,
            "corrected": 300,
            "unchanged": 300,
            "pending": 70,
            "expired": 0,
        }
    )
    one, many = (label_state(engine, m) for m in models)
    assert one == many
    assert len(one["pending"]) == 70 and len(one["changes"]) == 600 + 1201
    assert [r[3] for r in one["predictions"] if r[0] == ids[1500]] == [0.0]
