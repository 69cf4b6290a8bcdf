"""Models API: defaults, names, pagination, threshold history, deletion with the data."""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import Engine

from tests.conftest import Tenant, make_tenant
from tests.support import (
    MODEL_TABLES,
    count,
    counts,
    create_model,
    label,
    model_body,
    predictions,
    rows,
    unique_name,
)


def project_models(engine: Engine, project_id: int) -> int:
    """How many models the project has."""
    return int(
        rows(engine, "SELECT count(*) FROM models WHERE project_id = :p", p=project_id)[0][0]
    )


def test_create_with_the_documented_defaults(tenant: Tenant) -> None:
    name = unique_name()
    r = tenant.client.post("/v1/models", json={"name": name})
    assert r.status_code == 201
    got = r.json()
    expected = {
        "name": name,
        "kind": "binary",
        "classes": ["0", "1"],
        "positive": "1",
        "threshold": 0.5,
        "label_delay_days": 30,
        "min_coverage": 0.9,
        "negative_after_days": None,
        "segment_keys": None,
        "time_zone": "UTC",
        "counts": {"predictions": 0, "labelled": 0, "pending_labels": 0},
        "first_prediction_at": None,
        "last_prediction_at": None,
    }
    assert {k: got[k] for k in expected} == expected
    assert tenant.client.get(f"/v1/models/{name}").json() == got


def test_create_with_settings(tenant: Tenant) -> None:
    body = model_body(
        classes=["kept", "returned"],
        positive="returned",
        threshold=0.35,
        label_delay_days=45,
        min_coverage=0.8,
        negative_after_days=30,
        segment_keys=["region", "channel"],
        time_zone="Europe/Berlin",
    )
    got = tenant.client.post("/v1/models", json=body).json()
    assert {k: got[k] for k in body} == body


def test_a_taken_name_is_409_in_its_project_only(
    tenant: Tenant, engine: Engine, sessions: Any
) -> None:
    name = unique_name()
    assert tenant.client.post("/v1/models", json={"name": name}).status_code == 201
    r = tenant.client.post("/v1/models", json={"name": name, "threshold": 0.9})
    assert r.status_code == 409
    assert r.headers["content-type"].startswith("application/problem+json")
    assert name in r.json()["detail"]
    assert project_models(engine, tenant.project_id) == 1
    other = make_tenant(sessions, tenant.client)  # names are unique per project
    r = tenant.client.post("/v1/models", json={"name": name}, headers=other.headers("admin"))
    assert r.status_code == 201
    assert project_models(engine, other.project_id) == 1


BAD_NAMES = ["Returns", "-returns", ".returns", "returns v2", "", "r" * 65, "retours/2", "rückgabe"]


@pytest.mark.parametrize("name", BAD_NAMES)
def test_a_name_off_the_pattern_is_422(tenant: Tenant, engine: Engine, name: str) -> None:
    r = tenant.client.post("/v1/models", json={"name": name})
    assert r.status_code == 422
    assert r.headers["content-type"].startswith("application/problem+json")
    assert [e["field"] for e in r.json()["errors"]] == ["name"]
    assert project_models(engine, tenant.project_id) == 0


@pytest.mark.parametrize(
    "body",
    [
        {"threshold": 1.5},
        {"min_coverage": -0.1},
        {"label_delay_days": 0},
        {"classes": ["0", "1", "2"]},
        {"classes": ["a", "a"]},
        {"positive": "2"},
        {"kind": "multiclass"},
        {"kind": "multiclass", "classes": ["a", "b"], "positive": "a"},
        {"kind": "regression"},
        {"segment_keys": ["region:north"]},
        {"colour": "red"},
        {"classes": ["kept\u0000", "returned"]},
        {"segment_keys": ["region\u0000"]},
    ],
    ids=[
        "threshold",
        "coverage",
        "delay",
        "three-binary",
        "repeated",
        "positive",
        "multiclass-no-classes",
        "multiclass-positive",
        "kind",
        "segment-key",
        "unknown",
        "class-with-nul",
        "segment-key-with-nul",
    ],
)
def test_bad_settings_are_422(tenant: Tenant, engine: Engine, body: dict[str, Any]) -> None:
    r = tenant.client.post("/v1/models", json=model_body(**body))
    assert r.status_code == 422, r.text
    assert r.json()["errors"]
    assert project_models(engine, tenant.project_id) == 0


def test_list_pages_with_a_cursor(tenant: Tenant) -> None:
    names = sorted(unique_name("shop") for _ in range(5))
    for name in reversed(names):
        assert tenant.client.post("/v1/models", json={"name": name}).status_code == 201
    seen: list[str] = []
    pages = 0
    params: dict[str, Any] = {"limit": 2}
    while True:
        page = tenant.client.get("/v1/models", params=params).json()
        pages += 1
        assert len(page["items"]) <= 2
        seen += [m["name"] for m in page["items"]]
        if page["next_cursor"] is None:
            break
        params["cursor"] = page["next_cursor"]
    assert pages == 3
    assert seen == names
    assert tenant.client.get("/v1/models", params={"limit": 0}).status_code == 422


@pytest.mark.parametrize("cursor", ["abc", "____", "%%%"])
def test_a_cursor_the_api_did_not_give_out_is_422(tenant: Tenant, cursor: str) -> None:
    """The cursor decoder's contract (routes_models.decode_cursor): a broken one is a 422."""
    names = [unique_name("shop") for _ in range(2)]
    for name in names:
        assert tenant.client.post("/v1/models", json={"name": name}).status_code == 201
    r = tenant.client.get("/v1/models", params={"cursor": cursor})
    assert r.status_code == 422, r.text
    assert r.json()["errors"][0]["field"] == "cursor"


def test_patch_keeps_threshold_history(tenant: Tenant, engine: Engine) -> None:
    model = create_model(tenant, engine)
    url = f"/v1/models/{model.name}"
    assert tenant.client.patch(url, json={"threshold": 0.7}).json()["threshold"] == 0.7
    assert tenant.client.patch(url, json={"min_coverage": 0.8}).status_code == 200
    assert tenant.client.patch(url, json={"threshold": 0.6}).status_code == 200
    for bad in ({"threshold": 1.5}, {"threshold": None}, {"name": "renamed"}):
        assert tenant.client.patch(url, json=bad).status_code == 422
    history = rows(
        engine,
        "SELECT threshold FROM threshold_changes WHERE model_id = :m ORDER BY id",
        m=model.id,
    )
    assert [r[0] for r in history] == [0.5, 0.7, 0.6]
    got = tenant.client.get(url).json()
    assert (got["threshold"], got["min_coverage"], got["name"]) == (0.6, 0.8, model.name)


def test_delete_removes_the_model_and_its_data(tenant: Tenant, engine: Engine) -> None:
    doomed, kept = create_model(tenant, engine), create_model(tenant, engine)
    for model in (doomed, kept):
        items = predictions(4)
        url = f"/v1/models/{model.name}"
        assert (
            tenant.client.post(f"{url}/predictions", json={"predictions": items}).status_code == 200
        )
        assert (
            tenant.client.post(
                f"{url}/labels",
                json={
                    "labels": [
                        label(items[0]["id"], "1"),
                        label(items[0]["id"], "1"),
                        label("order-late", "0"),
                    ]
                },
            ).status_code
            == 200
        )
        assert tenant.client.patch(url, json={"threshold": 0.4}).status_code == 200
    before = counts(engine, kept.id)
    assert all(before[t] > 0 for t in MODEL_TABLES)
    assert counts(engine, doomed.id) == before
    assert tenant.client.delete(f"/v1/models/{doomed.name}").status_code == 204
    assert counts(engine, doomed.id) == dict.fromkeys(MODEL_TABLES, 0)
    assert rows(engine, "SELECT count(*) FROM models WHERE id = :m", m=doomed.id)[0][0] == 0
    assert counts(engine, kept.id) == before
    assert tenant.client.get(f"/v1/models/{doomed.name}").status_code == 404
    assert tenant.client.delete(f"/v1/models/{doomed.name}").status_code == 404
    # the name is free again, and the new model starts empty
    again = create_model(tenant, engine, name=doomed.name)
    assert count(engine, "predictions", again.id) == 0


# India keeps UTC+05:30 and South Australia UTC+09:30, Nepal UTC+05:45 (IANA tz database,
# files `asia` and `australasia`): not whole hours, so hourly rollups cannot make their days
@pytest.mark.parametrize(
    ("zone", "says"),
    [
        ("Asia/Kolkata", "+05:30"),
        ("Australia/Adelaide", "+09:30"),
        ("Asia/Kathmandu", "whole number of hours"),
        ("Europe/Berln", "Europe/Berlin"),
        ("", "not an IANA time zone"),
    ],
)
def test_a_zone_off_the_hour_or_unknown_is_422_saying_why(
    tenant: Tenant, engine: Engine, zone: str, says: str
) -> None:
    r = tenant.client.post("/v1/models", json=model_body(time_zone=zone))
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert [e["field"] for e in r.json()["errors"]] == ["time_zone"]
    assert says in r.text
    assert project_models(engine, tenant.project_id) == 0


def test_patching_a_zone_checks_it_and_stores_nothing_when_refused(
    tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine, time_zone="America/Chicago")
    for bad in ("Asia/Kolkata", "Australia/Adelaide", None, "Chicago"):
        r = tenant.client.patch(f"/v1/models/{model.name}", json={"time_zone": bad})
        assert r.status_code == 422, r.text
        assert r.json()["errors"][0]["field"] == "time_zone"
        stored = rows(engine, "SELECT time_zone FROM models WHERE id = :m", m=model.id)
        assert stored == [("America/Chicago",)]
    r = tenant.client.patch(f"/v1/models/{model.name}", json={"time_zone": "Europe/Berlin"})
    assert r.status_code == 200 and r.json()["time_zone"] == "Europe/Berlin"
    assert rows(engine, "SELECT time_zone FROM models WHERE id = :m", m=model.id) == [
        ("Europe/Berlin",)
    ]
