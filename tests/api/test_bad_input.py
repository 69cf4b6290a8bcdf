"""Refused input: each case checks the status, the index and field named, and that nothing was
stored (rows counted with SQL). Every refused batch also holds good items: all or nothing."""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from datetime import timedelta
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from belated.app import create_app
from belated.config import Settings
from tests.conftest import Tenant
from tests.support import (
    Model,
    create_model,
    label,
    predictions,
    rows,
    stamp,
    tags,
    three_class_scores,
    utcnow,
)

BAD_AT = 2
Item = dict[str, Any]


def assert_refused(r: httpx.Response, index: int | None, field: str) -> dict[str, Any]:
    """A 422 problem that names the item and field, and names no other item."""
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    body = r.json()
    assert body["status"] == 422
    named = [e for e in body["errors"] if e["index"] == index and e["field"].startswith(field)]
    assert named, body
    assert all(e["reason"] for e in named)
    assert all(e["index"] == index for e in body["errors"]), body
    where = f"item {index}" if index is not None else "the request"
    assert where in body["detail"] and f"'{field}" in body["detail"], body["detail"]
    return body


def assert_nothing_stored(engine: Engine, model: Model) -> None:
    """No predictions, labels, pending labels or dirty marks for the model."""
    for table in ("predictions", "labels", "pending_labels", "dirty_buckets"):
        found = rows(engine, f"SELECT count(*) FROM {table} WHERE model_id = :m", m=model.id)
        assert found[0][0] == 0, table


def _without_score(item: Item, **extra: Any) -> Item:
    return {k: v for k, v in item.items() if k != "score"} | extra


# (case id, make the bad item from a good one, field the error must name)
PREDICTION_CASES: list[tuple[str, Callable[[Item], Item], str]] = [
    ("id-empty", lambda it: it | {"id": ""}, "id"),
    ("id-missing", lambda it: {k: v for k, v in it.items() if k != "id"}, "id"),
    ("id-129-chars", lambda it: it | {"id": "r" * 129}, "id"),
    ("ts-not-a-time", lambda it: it | {"ts": "next tuesday"}, "ts"),
    ("ts-bad-month", lambda it: it | {"ts": "2026-13-01T00:00:00Z"}, "ts"),
    ("ts-missing", lambda it: {k: v for k, v in it.items() if k != "ts"}, "ts"),
    ("ts-25h-ahead", lambda it: it | {"ts": stamp(utcnow() + timedelta(hours=25))}, "ts"),
    ("score-1.5", lambda it: it | {"score": 1.5}, "score"),
    ("score-minus-0.1", lambda it: it | {"score": -0.1}, "score"),
    ("score-string", lambda it: it | {"score": "0.3"}, "score"),
    ("score-true", lambda it: it | {"score": True}, "score"),
    ("score-missing", lambda it: _without_score(it), "score"),
    (
        "scores-not-the-classes",
        lambda it: _without_score(it, scores={"kept": 0.4, "returned": 0.6}),
        "scores",
    ),
    (
        "scores-extra-class",
        lambda it: _without_score(it, scores={"0": 0.4, "1": 0.5, "2": 0.1}),
        "scores",
    ),
    ("scores-sum-1.1", lambda it: _without_score(it, scores={"0": 0.5, "1": 0.6}), "scores"),
    (
        "scores-sum-off-by-2e-4",
        lambda it: _without_score(it, scores={"0": 0.3, "1": 0.7002}),
        "scores",
    ),
    ("predicted-not-a-class", lambda it: it | {"predicted": "2"}, "predicted"),
    ("predicted-int-not-a-class", lambda it: it | {"predicted": 2}, "predicted"),
    ("predicted-true", lambda it: it | {"predicted": True}, "predicted"),
    ("tags-17", lambda it: it | {"tags": tags(17)}, "tags"),
    ("tag-key-65-chars", lambda it: it | {"tags": tags(1, key_len=65)}, "tags"),
    ("tag-value-65-chars", lambda it: it | {"tags": tags(1, value_len=65)}, "tags"),
    ("tag-key-with-colon", lambda it: it | {"tags": {"region:north": "yes"}}, "tags"),
    ("tags-not-an-object", lambda it: it | {"tags": ["region"]}, "tags"),
]


@pytest.fixture()
def model(tenant: Tenant, engine: Engine) -> Model:
    """A binary model with the default settings."""
    return create_model(tenant, engine)


@pytest.mark.parametrize(
    "make_bad, field", [c[1:] for c in PREDICTION_CASES], ids=[c[0] for c in PREDICTION_CASES]
)
def test_bad_prediction_refused_and_batch_not_stored(
    tenant: Tenant, engine: Engine, model: Model, make_bad: Callable[[Item], Item], field: str
) -> None:
    batch = predictions(5)
    batch[BAD_AT] = make_bad(batch[BAD_AT])
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert_refused(r, BAD_AT, field)
    assert_nothing_stored(engine, model)


def test_limits_themselves_are_accepted(tenant: Tenant, engine: Engine, model: Model) -> None:
    """The edges of the refused cases: 128-character id, 16 tags of 64, a day ahead, 0 and 1."""
    batch = predictions(4)
    batch[0] |= {"id": "r" * 128, "score": 0.0}
    batch[1] |= {"tags": tags(16, key_len=64, value_len=64), "score": 1.0}
    batch[2] |= {"ts": stamp(utcnow() + timedelta(hours=23))}
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 200, r.text
    assert r.json() == {"accepted": 4, "duplicates": 0}


def test_score_overflowing_to_infinity_is_a_422(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    """1e400 is valid JSON syntax but no finite double: the item and field must be named."""
    batch = predictions(5)
    batch[BAD_AT]["score"] = "SCORE"
    raw = json.dumps({"predictions": batch}).replace('"SCORE"', "1e400")
    r = tenant.client.post(
        f"/v1/models/{model.name}/predictions",
        content=raw,
        headers={"content-type": "application/json"},
    )
    assert_refused(r, BAD_AT, "score")
    assert_nothing_stored(engine, model)


def test_every_bad_item_is_listed(tenant: Tenant, engine: Engine, model: Model) -> None:
    batch = predictions(6)
    batch[0]["id"] = ""
    batch[3]["score"] = 2
    batch[5]["tags"] = {"a:b": "c"}
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 422
    named = {(e["index"], e["field"].split(".")[0]) for e in r.json()["errors"]}
    assert named == {(0, "id"), (3, "score"), (5, "tags")}
    assert_nothing_stored(engine, model)


def test_same_id_twice_with_different_content_names_both_indexes(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    batch = predictions(5)
    batch[3] = batch[1] | {"score": 1 - batch[1]["score"]}
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    body = assert_refused(r, 3, "id")
    assert "index 1" in body["errors"][0]["reason"]
    assert_nothing_stored(engine, model)


@pytest.mark.parametrize(
    "raw",
    [b"{not json", b"", b"\xff\xfe", b'{"predictions": [}'],
    ids=["broken", "empty", "not-utf8", "truncated"],
)
def test_body_that_is_not_json_is_a_400(
    tenant: Tenant, engine: Engine, model: Model, raw: bytes
) -> None:
    r = tenant.client.post(
        f"/v1/models/{model.name}/predictions",
        content=raw,
        headers={"content-type": "application/json"},
    )
    assert r.status_code == 400
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "JSON" in r.json()["detail"]
    assert_nothing_stored(engine, model)


@pytest.mark.parametrize(
    "body",
    [{"preds": []}, {"predictions": {"id": "x"}}, [], "text"],
    ids=["wrong-key", "not-a-list", "array", "string"],
)
def test_body_of_the_wrong_shape_is_a_422(
    tenant: Tenant, engine: Engine, model: Model, body: Any
) -> None:
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json=body)
    assert_refused(r, None, "predictions")
    assert_nothing_stored(engine, model)


def test_item_that_is_not_an_object_is_named(tenant: Tenant, engine: Engine, model: Model) -> None:
    batch: list[Any] = predictions(4)
    batch[BAD_AT] = ["order", 0.3]
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 422
    assert [e["index"] for e in r.json()["errors"]] == [BAD_AT]
    assert_nothing_stored(engine, model)


MULTICLASS = ("chair", "sofa", "table")
MULTICLASS_CASES: list[tuple[str, Callable[[Item], Item], str]] = [
    ("score-not-scores", lambda it: it, "score"),
    ("no-scores", lambda it: _without_score(it), "scores"),
    (
        "scores-missing-a-class",
        lambda it: _without_score(it, scores={"chair": 0.5, "sofa": 0.5}),
        "scores",
    ),
    (
        "scores-negative",
        lambda it: _without_score(it, scores={"chair": 1.2, "sofa": -0.2, "table": 0.0}),
        "scores",
    ),
    (
        "predicted-not-a-class",
        lambda it: _without_score(
            it, scores=three_class_scores("sofa", 0.8, MULTICLASS), predicted="bed"
        ),
        "predicted",
    ),
]


@pytest.mark.parametrize(
    "make_bad, field", [c[1:] for c in MULTICLASS_CASES], ids=[c[0] for c in MULTICLASS_CASES]
)
def test_bad_multiclass_prediction_refused(
    tenant: Tenant, engine: Engine, make_bad: Callable[[Item], Item], field: str
) -> None:
    model = create_model(tenant, engine, kind="multiclass", classes=list(MULTICLASS))
    batch = [
        _without_score(p, scores=three_class_scores("chair", 0.6, MULTICLASS))
        for p in predictions(4)
    ]
    batch[BAD_AT] = make_bad(predictions(4)[BAD_AT])
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert_refused(r, BAD_AT, field)
    assert_nothing_stored(engine, model)


LABEL_CASES: list[tuple[str, Callable[[Item], Item], str]] = [
    ("id-empty", lambda it: it | {"id": ""}, "id"),
    ("id-129-chars", lambda it: it | {"id": "r" * 129}, "id"),
    ("actual-not-a-class", lambda it: it | {"actual": "2"}, "actual"),
    ("actual-missing", lambda it: {k: v for k, v in it.items() if k != "actual"}, "actual"),
    ("actual-true", lambda it: it | {"actual": True}, "actual"),
    ("actual-float", lambda it: it | {"actual": 1.0}, "actual"),
    ("ts-not-a-time", lambda it: it | {"ts": "yesterday-ish"}, "ts"),
    ("ts-2-days-ahead", lambda it: it | {"ts": stamp(utcnow() + timedelta(days=2))}, "ts"),
]


@pytest.mark.parametrize(
    "make_bad, field", [c[1:] for c in LABEL_CASES], ids=[c[0] for c in LABEL_CASES]
)
def test_bad_label_refused_and_batch_not_stored(
    tenant: Tenant, engine: Engine, model: Model, make_bad: Callable[[Item], Item], field: str
) -> None:
    stored = predictions(3)
    assert (
        tenant.client.post(
            f"/v1/models/{model.name}/predictions", json={"predictions": stored}
        ).status_code
        == 200
    )
    marks = rows(engine, "SELECT hour, seq FROM dirty_buckets WHERE model_id = :m", m=model.id)
    # good labels for stored ids and for ids not yet seen, with the bad one among them
    batch = [label(p["id"], "1") for p in stored] + [label("order-later", "0")]
    batch[BAD_AT] = make_bad(batch[BAD_AT])
    r = tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": batch})
    assert_refused(r, BAD_AT, field)
    for table in ("labels", "pending_labels"):
        assert (
            rows(engine, f"SELECT count(*) FROM {table} WHERE model_id = :m", m=model.id)[0][0] == 0
        )
    assert (
        rows(
            engine,
            "SELECT count(*) FROM predictions WHERE model_id = :m AND actual IS NOT NULL",
            m=model.id,
        )[0][0]
        == 0
    )
    assert (
        rows(engine, "SELECT hour, seq FROM dirty_buckets WHERE model_id = :m", m=model.id) == marks
    )


def test_same_label_id_twice_with_different_actual_names_both_indexes(
    tenant: Tenant, engine: Engine, model: Model
) -> None:
    batch = [label(f"order-{n}", "0") for n in range(4)]
    batch[3] = label("order-1", "1")
    r = tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": batch})
    body = assert_refused(r, 3, "id")
    assert "index 1" in body["errors"][0]["reason"]
    assert_nothing_stored(engine, model)


@pytest.fixture()
def small_client(store_url: str, engine: Engine) -> Iterator[TestClient]:
    """An app on the same store with a batch limit of 5 and a body limit of 2048 bytes."""
    settings = Settings(database_url=store_url, jobs=False, max_batch=5, max_body_bytes=2048)
    with TestClient(create_app(settings, engine=engine, jobs=False)) as c:
        yield c


@pytest.mark.parametrize("kind", ["predictions", "labels"])
def test_batch_over_max_batch_is_a_413(
    tenant: Tenant, engine: Engine, model: Model, small_client: TestClient, kind: str
) -> None:
    headers = tenant.headers("ingest")
    url = f"/v1/models/{model.name}/{kind}"

    def batch(n: int) -> list[Item]:
        items = predictions(n)
        return items if kind == "predictions" else [label(p["id"], "1") for p in items]

    r = small_client.post(url, json={kind: batch(6)}, headers=headers)
    assert r.status_code == 413
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "5" in r.json()["detail"] and "BELATED_MAX_BATCH" in r.json()["detail"]
    assert_nothing_stored(engine, model)
    r = small_client.post(url, json={kind: batch(5)}, headers=headers)
    assert r.status_code == 200, r.text


def test_body_over_max_body_bytes_is_a_413(
    tenant: Tenant, engine: Engine, model: Model, small_client: TestClient
) -> None:
    headers = tenant.headers("ingest") | {"content-type": "application/json"}
    url = f"/v1/models/{model.name}/predictions"
    # four items fit under 2048 bytes; padded tags push the same batch over the limit
    small = json.dumps({"predictions": predictions(4)}).encode()
    big = json.dumps({"predictions": predictions(4, tags=tags(8, value_len=64))}).encode()
    assert len(small) < 2048 < len(big)
    r = small_client.post(url, content=big, headers=headers)
    assert r.status_code == 413
    assert r.headers["content-type"].startswith("application/problem+json")
    assert "2048" in r.json()["detail"]
    assert_nothing_stored(engine, model)
    assert small_client.post(url, content=small, headers=headers).status_code == 200
