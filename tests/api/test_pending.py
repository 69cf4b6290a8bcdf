"""The life cycle of pending labels over the API, on both stores: `keep_raw_days` (its
default, settable on create and PATCH, a 422 on values that cannot be kept), and
`GET /v1/models/{model}/pending` listing labels that wait for their prediction, with their
age, page by page. Ages are checked against the test's own clock readings."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import pytest
from sqlalchemy import Engine

from belated.api.routes_models import encode_cursor
from belated.clock import clock
from tests.conftest import Tenant
from tests.support import count, create_model, model_body, predictions, send, stamp

T0 = datetime(2026, 11, 2, 9, 0, tzinfo=UTC)


def _model(tenant: Tenant, name: str) -> dict[str, Any]:
    r = tenant.client.get(f"/v1/models/{name}")
    assert r.status_code == 200, r.text
    return dict(r.json())


@pytest.mark.parametrize(
    ("fields", "expected"),
    [
        ({}, 60.0),  # label_delay_days 30 by default, plus 30
        ({"label_delay_days": 14, "negative_after_days": 45}, 75.0),
        ({"label_delay_days": 50, "negative_after_days": 20}, 80.0),
        ({"label_delay_days": 14, "keep_raw_days": 400}, 400.0),
    ],
)
def test_keep_raw_days_defaults_to_the_longer_wait_plus_30_days(
    tenant: Tenant, engine: Engine, fields: dict[str, Any], expected: float
) -> None:
    model = create_model(tenant, engine, **fields)
    got = _model(tenant, model.name)
    assert got["keep_raw_days"] == expected
    assert got["keep_raw_days_default"] is ("keep_raw_days" not in fields)


def test_keep_raw_days_is_set_reset_and_checked_on_patch(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine, label_delay_days=14)
    path = f"/v1/models/{model.name}"
    r = tenant.client.patch(path, json={"keep_raw_days": 120.5})
    assert r.status_code == 200, r.text
    assert r.json()["keep_raw_days"] == 120.5 and not r.json()["keep_raw_days_default"]
    before = _model(tenant, model.name)
    for body in (
        {"keep_raw_days": 0},
        {"keep_raw_days": -3},
        {"keep_raw_days": "a month"},
        {"keep_raw_days": 1e9},
        {"keep_raw_days": 10},  # shorter than label_delay_days
        {"label_delay_days": 200},  # now longer than the kept 120.5 days
        {"negative_after_days": 121},
    ):
        r = tenant.client.patch(path, json=body)
        assert r.status_code == 422, (body, r.text)
        assert r.headers["content-type"].startswith("application/problem+json")
        fields = [e["field"] for e in r.json()["errors"]]
        assert any("keep_raw_days" in str(f) for f in fields), (body, r.json())
        after = _model(tenant, model.name)
        assert {k: v for k, v in after.items() if k != "counts"} == {
            k: v for k, v in before.items() if k != "counts"
        }
    r = tenant.client.patch(path, json={"keep_raw_days": None, "label_delay_days": 200})
    assert r.status_code == 200, r.text
    assert r.json()["keep_raw_days"] == 230 and r.json()["keep_raw_days_default"]


def test_a_create_with_a_bad_keep_raw_days_stores_no_model(tenant: Tenant) -> None:
    for extra in ({"keep_raw_days": 5, "label_delay_days": 14}, {"keep_raw_days": True}):
        body = model_body(**extra)
        r = tenant.client.post("/v1/models", json=body)
        assert r.status_code == 422, (extra, r.text)
        assert tenant.client.get(f"/v1/models/{body['name']}").status_code == 404


def test_pending_labels_are_listed_with_their_age_page_by_page(
    tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine, label_delay_days=14, keep_raw_days=20)
    sent_at = [T0 + timedelta(hours=5 * k) for k in range(5)]
    for k, when in enumerate(sent_at):
        clock.set(when)
        label = {"id": f"late-{k}", "actual": str(k % 2), "ts": stamp(when - timedelta(hours=1))}
        assert send(tenant.client, model.name, "labels", [label])["pending"] == 1
    now = T0 + timedelta(days=2)
    clock.set(now)
    path = f"/v1/models/{model.name}/pending"
    seen: list[dict[str, Any]] = []
    params: dict[str, Any] = {"limit": 2}
    pages = 0
    while True:
        r = tenant.client.get(path, params=params, headers=tenant.headers("read"))
        assert r.status_code == 200, r.text
        page = r.json()
        assert len(page["items"]) <= 2
        seen += page["items"]
        pages += 1
        if not page["next_cursor"]:
            break
        params["cursor"] = page["next_cursor"]
    assert pages == 3
    assert [p["id"] for p in seen] == [f"late-{k}" for k in range(5)]
    for k, item in enumerate(seen):
        assert item["actual"] == str(k % 2)
        assert item["received_at"] == stamp(sent_at[k])
        assert item["age_hours"] == pytest.approx((now - sent_at[k]).total_seconds() / 3600)
        assert item["dropped_after"] == stamp(sent_at[k] + timedelta(days=20))

    # the prediction arrives: its label is joined and leaves the list
    pred = predictions(1, base=T0 - timedelta(hours=3))[0] | {"id": "late-0"}
    send(tenant.client, model.name, "predictions", [pred])
    r = tenant.client.get(path, headers=tenant.headers("read"))
    assert [p["id"] for p in r.json()["items"]] == [f"late-{k}" for k in range(1, 5)]
    assert count(engine, "pending_labels", model.id) == 4


def test_the_pending_list_needs_a_read_token_and_a_sound_cursor(
    tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    path = f"/v1/models/{model.name}/pending"
    for scope in ("ingest", "admin"):
        assert tenant.client.get(path, headers=tenant.headers(scope)).status_code == 403
    for cursor in ("not-a-cursor", encode_cursor("9" * 30), encode_cursor("²")):
        r = tenant.client.get(path, params={"cursor": cursor}, headers=tenant.headers("read"))
        assert r.status_code == 422 and r.json()["errors"][0]["field"] == "cursor", r.text
    r = tenant.client.get(path, params={"limit": 0}, headers=tenant.headers("read"))
    assert r.status_code == 422
    r = tenant.client.get("/v1/models/no-such/pending", headers=tenant.headers("read"))
    assert r.status_code == 404
