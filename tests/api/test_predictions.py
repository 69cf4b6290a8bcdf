"""Prediction ingest: duplicates, conflicts, UTC storage, derived classes, scores maps, counts."""

from __future__ import annotations

import math
from collections.abc import Callable
from datetime import UTC, datetime, timedelta, timezone
from typing import Any

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
    prediction,
    prediction_row,
    predictions,
    rows,
    stamp,
    three_class_scores,
)


def post(tenant: Tenant, model: Model, items: list[dict[str, Any]]) -> Any:
    """POST a predictions batch."""
    return tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": items})


def dirty_marks(engine: Engine, model: Model) -> list[tuple[int, int]]:
    """The model's dirty (hour, seq) marks."""
    return [
        tuple(r)
        for r in rows(
            engine,
            "SELECT hour, seq FROM dirty_buckets WHERE model_id = :m ORDER BY hour, seq",
            m=model.id,
        )
    ]


@pytest.fixture()
def model(tenant: Tenant, engine: Engine) -> Model:
    """A binary model with the default settings."""
    return create_model(tenant, engine)


def test_repeats_with_the_same_content_are_duplicates(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    first = predictions(5)
    assert post(tenant, model, first).json() == {"accepted": 5, "duplicates": 0}
    assert post(tenant, model, first).json() == {"accepted": 0, "duplicates": 5}
    # the same time written with another offset is the same content
    shifted = dict(
        first[0], ts=datetime.fromisoformat(first[0]["ts"]).astimezone(timezone_plus(2)).isoformat()
    )
    later = [shifted, *first[1:3], *predictions(2, start=5)]
    assert post(tenant, model, later).json() == {"accepted": 2, "duplicates": 3}
    # one id twice in a batch with the same content: stored once, the repeat is a duplicate
    twice = predictions(1, start=7)
    assert post(tenant, model, twice + twice).json() == {"accepted": 1, "duplicates": 1}
    assert count(engine, "predictions", model.id) == 8


def timezone_plus(hours: int) -> timezone:
    """A fixed UTC offset."""
    return timezone(timedelta(hours=hours))


CHANGES: dict[str, Callable[[dict[str, Any]], dict[str, Any]]] = {
    "score": lambda p: p | {"score": 1 - p["score"]},
    "ts": lambda p: p | {"ts": stamp(base_time() - timedelta(hours=5))},
    "predicted": lambda p: p | {"predicted": "0" if p["score"] >= 0.5 else "1"},
    "tags": lambda p: p | {"tags": {"region": "north"}},
}


@pytest.mark.parametrize("change", CHANGES.values(), ids=CHANGES.keys())
def test_same_id_with_other_content_is_409_and_nothing_of_the_batch_is_stored(
    tenant: Tenant,
    engine: Engine,
    model: Model,
    change: Callable[[dict[str, Any]], dict[str, Any]],
) -> None:
    stored = predictions(3)
    assert post(tenant, model, stored).status_code == 200
    marks = dirty_marks(engine, model)
    # new ids in hours not yet touched, around two changed stored ones
    fresh = predictions(2, start=600, prefix="fresh")
    batch = [fresh[0], change(stored[1]), fresh[1], change(stored[2])]
    r = post(tenant, model, batch)
    assert r.status_code == 409
    assert r.headers["content-type"].startswith("application/problem+json")
    body = r.json()
    assert sorted(body["ids"]) == [stored[1]["id"], stored[2]["id"]]
    assert repr(stored[1]["id"]) in body["detail"] and repr(stored[2]["id"]) in body["detail"]
    assert count(engine, "predictions", model.id) == 3
    assert count(engine, "predictions", model.id, "pid LIKE 'fresh%'") == 0
    assert dirty_marks(engine, model) == marks
    assert prediction_row(engine, model.id, stored[1]["id"])["score"] == stored[1]["score"]


def test_time_without_offset_is_utc_and_offsets_are_converted(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    when = base_time() + timedelta(minutes=17, seconds=30)
    naive = when.replace(tzinfo=None).isoformat()
    with_offset = when.astimezone(timezone_plus(2)).isoformat()
    assert "+" not in naive and "Z" not in naive and with_offset.endswith("+02:00")
    items = [prediction(0, ts=naive), prediction(1, ts=with_offset)]
    assert post(tenant, model, items).status_code == 200
    for item in items:
        row = prediction_row(engine, model.id, item["id"])
        assert row["ts"] == when and row["ts"].utcoffset() == timedelta(0)
        assert row["hour"] == epoch_hour(when)
    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert datetime.fromisoformat(got["first_prediction_at"]) == when


def test_dirty_marks_are_the_hours_of_the_predictions(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    base = base_time()
    items = [prediction(n, base=base) for n in (0, 30, 65, 190)]  # minutes after base
    assert post(tenant, model, items).status_code == 200
    expected = {epoch_hour(base + timedelta(minutes=m)) for m in (0, 30, 65, 190)}
    assert {h for h, _ in dirty_marks(engine, model)} == expected
    assert len(expected) == 3


def test_model_counts_and_first_and_last_prediction_time(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    empty = tenant.client.get(f"/v1/models/{model.name}").json()
    assert empty["counts"] == {"predictions": 0, "labelled": 0, "pending_labels": 0}
    assert empty["first_prediction_at"] is None and empty["last_prediction_at"] is None
    items = predictions(10)
    assert post(tenant, model, items[5:] + items[:5]).status_code == 200
    labels = [label(p["id"], "1") for p in items[:4]] + [
        label("order-x", "0"),
        label("order-y", "1"),
    ]
    assert (
        tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": labels}).status_code
        == 200
    )
    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert got["counts"] == {"predictions": 10, "labelled": 4, "pending_labels": 2}
    times = [datetime.fromisoformat(p["ts"]) for p in items]
    assert datetime.fromisoformat(got["first_prediction_at"]) == min(times)
    assert datetime.fromisoformat(got["last_prediction_at"]) == max(times)


def test_pending_label_is_joined_when_its_prediction_arrives(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    item = prediction(3)
    outcome_at = datetime.fromisoformat(item["ts"]) + timedelta(hours=30)
    r = tenant.client.post(
        f"/v1/models/{model.name}/labels",
        json={"labels": [label(item["id"], 1, ts=outcome_at), label("order-still-waiting", 0)]},
    )
    assert r.json() == {"matched": 0, "pending": 2, "corrected": 0, "unchanged": 0, "expired": 0}
    assert count(engine, "pending_labels", model.id) == 2
    assert post(tenant, model, [item]).json() == {"accepted": 1, "duplicates": 0}
    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert got["counts"] == {"predictions": 1, "labelled": 1, "pending_labels": 1}
    row = prediction_row(engine, model.id, item["id"])
    assert row["actual"] == "1" and row["label_ts"] == outcome_at
    assert count(engine, "pending_labels", model.id, "pid = :p", p=item["id"]) == 0
    assert rows(engine, "SELECT delay_h FROM predictions WHERE model_id = :m", m=model.id)[0][
        0
    ] == pytest.approx(30.0)


def test_predicted_comes_from_the_threshold_unless_given(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine, threshold=0.7)
    items = [
        prediction(0, score=0.7),
        prediction(1, score=0.69),
        prediction(2, score=0.9, predicted="0"),
        prediction(3, score=0.2, predicted=1),
    ]
    assert post(tenant, model, items).status_code == 200
    got = [prediction_row(engine, model.id, p["id"])["predicted"] for p in items]
    assert got == ["1", "0", "0", "1"]
    # 1 and "1" are the same class: sending the string form again is a duplicate
    again = dict(items[3], predicted="1")
    assert post(tenant, model, [again]).json() == {"accepted": 0, "duplicates": 1}


def test_binary_scores_map_within_tolerance_is_renormalised(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    scores = {"0": 0.30004, "1": 0.70001}  # sums to 1.00005, inside 1e-4
    item = {k: v for k, v in prediction(0).items() if k != "score"} | {"scores": scores}
    assert post(tenant, model, [item]).status_code == 200
    row = prediction_row(engine, model.id, item["id"])
    assert row["score"] == pytest.approx(0.70001 / 1.00005, rel=1e-12)
    assert row["predicted"] == "1"


CLASSES = ("chair", "sofa", "table")


def test_multiclass_scores_give_predicted_by_argmax_and_are_renormalised(
    tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine, kind="multiclass", classes=list(CLASSES))
    base = [{k: v for k, v in p.items() if k != "score"} for p in predictions(4)]
    off = {"chair": 0.20002, "sofa": 0.50002, "table": 0.30002}  # sums to 1.00006
    items = [
        base[0] | {"scores": three_class_scores("sofa", 0.5, CLASSES)},
        base[1] | {"scores": three_class_scores("table", 0.8, CLASSES)},
        base[2] | {"scores": off},
        base[3] | {"scores": three_class_scores("chair", 0.6, CLASSES), "predicted": "sofa"},
    ]
    assert post(tenant, model, items).json() == {"accepted": 4, "duplicates": 0}
    stored = [prediction_row(engine, model.id, p["id"]) for p in items]
    assert [s["predicted"] for s in stored] == ["sofa", "table", "sofa", "sofa"]
    total = sum(off.values())
    assert stored[2]["scores"] == pytest.approx({c: v / total for c, v in off.items()}, rel=1e-12)
    assert math.isclose(sum(stored[2]["scores"].values()), 1.0, rel_tol=1e-12)
    assert stored[1]["score"] == pytest.approx(0.8)  # the top probability
    # the stored, renormalised maps still compare equal to what was sent
    assert post(tenant, model, items).json() == {"accepted": 0, "duplicates": 4}
    got = tenant.client.get(f"/v1/models/{model.name}").json()
    assert got["kind"] == "multiclass" and got["classes"] == list(CLASSES)
    assert got["positive"] is None


def test_integer_classes_are_their_decimal_strings(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine, kind="multiclass", classes=[0, 1, 2])
    item = {k: v for k, v in prediction(0).items() if k != "score"}
    item |= {"scores": {"0": 0.1, "1": 0.2, "2": 0.7}, "predicted": 2}
    assert post(tenant, model, [item]).status_code == 200
    assert prediction_row(engine, model.id, item["id"])["predicted"] == "2"
    url = f"/v1/models/{model.name}/labels"
    r = tenant.client.post(url, json={"labels": [label(item["id"], 2)]})
    assert r.json()["matched"] == 1
    r = tenant.client.post(url, json={"labels": [label(item["id"], "2")]})
    assert r.json()["unchanged"] == 1
    assert count(engine, "labels", model.id) == 1


def test_tags_are_stored_as_sent(tenant: Tenant, engine: Engine, model: Model) -> None:
    sent = {"region": "north", "channel": "web-shop", "category": "sofas"}
    item = prediction(0, tags=sent)
    assert post(tenant, model, [item, prediction(1)]).status_code == 200
    assert prediction_row(engine, model.id, item["id"])["tags"] == sent
    assert prediction_row(engine, model.id, "order-1")["tags"] is None


def test_received_time_is_stored_in_utc(tenant: Tenant, engine: Engine, model: Model) -> None:
    before = datetime.now(UTC)
    assert post(tenant, model, predictions(1)).status_code == 200
    (received,) = rows(
        engine, "SELECT received_at FROM predictions WHERE model_id = :m", m=model.id
    )[0]
    got = from_db(received)
    assert got is not None and before - timedelta(seconds=1) <= got <= datetime.now(UTC)


def test_batches_past_the_small_size_keep_every_guarantee(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    """Large batches take another way into the store on PostgreSQL (COPY straight into the
    table, the staged insert when an id is already stored): the answers are the same."""
    big = 450  # past the one-statement size of 200
    sent = predictions(big, tags={"region": "north"})
    waiting = sent[7]
    r = tenant.client.post(
        f"/v1/models/{model.name}/labels", json={"labels": [label(waiting["id"], 1)]}
    )
    assert r.json()["pending"] == 1
    assert post(tenant, model, sent).json() == {"accepted": big, "duplicates": 0}
    assert count(engine, "predictions", model.id) == big
    assert prediction_row(engine, model.id, sent[3]["id"])["tags"] == {"region": "north"}
    assert prediction_row(engine, model.id, waiting["id"])["actual"] == "1"
    assert count(engine, "pending_labels", model.id) == 0
    # resent whole, then half resent with new ones: duplicates counted, the new stored
    assert post(tenant, model, sent).json() == {"accepted": 0, "duplicates": big}
    mixed = sent[:300] + predictions(250, start=big)
    assert post(tenant, model, mixed).json() == {"accepted": 250, "duplicates": 300}
    assert count(engine, "predictions", model.id) == big + 250
    # one stored id with other content among 400 new ones: 409, nothing of it stored
    marks = dirty_marks(engine, model)
    changed = dict(sent[5], score=0.01 if sent[5]["score"] > 0.5 else 0.99)
    clash = predictions(400, prefix="late") + [changed]
    r = post(tenant, model, clash)
    assert r.status_code == 409 and r.json()["ids"] == [sent[5]["id"]]
    assert count(engine, "predictions", model.id) == big + 250
    assert count(engine, "predictions", model.id, "pid LIKE 'late%'") == 0
    assert dirty_marks(engine, model) == marks
