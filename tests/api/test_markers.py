"""Markers: dated notes on a model's timeline; admin writes, read lists; bad input stores
nothing."""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import Engine

from tests.conftest import Tenant
from tests.support import Model, create_model, rows


def _markers(engine: Engine, model: Model | None = None) -> int:
    sql = "SELECT count(*) FROM markers" + (" WHERE model_id = :m" if model else "")
    return int(rows(engine, sql, m=model.id if model else None)[0][0])


def test_add_list_and_remove_a_marker(tenant: Tenant, engine: Engine, sessions: Any) -> None:
    from belated.store import keys
    from belated.store.db import transaction

    with transaction(sessions) as session:
        _, named = keys.create(
            session=session, project_id=tenant.project_id, scopes=["admin"], name="ops-anna"
        )
    model = create_model(tenant, engine)
    c, path = tenant.client, f"/v1/models/{model.name}/markers"
    r = c.post(
        path,
        json={"at": "2026-10-01T10:00:00+02:00", "text": "  supplier change in the north  "},
        headers={"Authorization": f"Bearer {named}"},
    )
    assert r.status_code == 201, r.text
    marker = r.json()
    assert set(marker) == {"id", "model", "at", "text", "who", "created_at"}
    assert (
        marker["at"] == "2026-10-01T08:00:00Z" and marker["text"] == "supplier change in the north"
    )
    assert marker["who"] == "ops-anna" and marker["model"] == model.name
    later = c.post(path, json={"at": "2026-10-20T00:00:00Z", "text": "new sofa range"}).json()
    listed = c.get(path, headers=tenant.headers("read"))
    assert listed.status_code == 200
    assert [m["id"] for m in listed.json()["items"]] == [marker["id"], later["id"]]
    assert listed.json()["next_cursor"] is None
    window = c.get(path, params={"start": "2026-10-10T00:00:00Z", "end": "2026-11-01T00:00:00Z"})
    assert [m["id"] for m in window.json()["items"]] == [later["id"]]
    assert c.delete(f"{path}/{marker['id']}", headers=tenant.headers("admin")).status_code == 204
    again = c.delete(f"{path}/{marker['id']}")
    assert again.status_code == 404 and marker["id"] in again.json()["detail"]
    assert [m["id"] for m in c.get(path).json()["items"]] == [later["id"]]
    # a model's markers go with it
    assert c.delete(f"/v1/models/{model.name}").status_code == 204
    assert _markers(engine, model) == 0


@pytest.mark.parametrize(
    "body, field, words",
    [
        ({"at": "2026-10-01T00:00:00Z"}, "text", "required"),
        ({"at": "2026-10-01T00:00:00Z", "text": ""}, "text", "at least 1"),
        ({"at": "2026-10-01T00:00:00Z", "text": "   "}, "text", "blank"),
        ({"at": "2026-10-01T00:00:00Z", "text": "x" * 501}, "text", "500"),
        ({"at": "2026-10-01T00:00:00Z", "text": "a\x00b"}, "text", "NUL"),
        ({"text": "supplier change"}, "at", "required"),
        ({"at": "yesterday", "text": "supplier change"}, "at", "RFC 3339"),
        ({"at": 12, "text": "supplier change"}, "at", "RFC 3339"),
        ({"at": "0001-01-01T00:00:00+05:00", "text": "x"}, "at", ""),
        ({"at": "1900-01-01T00:00:00Z", "text": "supplier change"}, "at", "1970"),
        ({"at": "2026-10-01T00:00:00Z", "text": "x", "colour": "red"}, "colour", ""),
    ],
)
def test_a_bad_marker_is_refused_naming_the_field_and_nothing_is_stored(
    tenant: Tenant, engine: Engine, body: dict[str, Any], field: str, words: str
) -> None:
    model = create_model(tenant, engine)
    r = tenant.client.post(f"/v1/models/{model.name}/markers", json=body)
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    problem = r.json()
    assert problem["errors"][0]["field"] == field, problem
    assert words.lower() in (problem["errors"][0]["reason"] + problem["detail"]).lower()
    assert _markers(engine, model) == 0


def test_scopes_and_projects_guard_markers(
    tenant: Tenant, engine: Engine, sessions: Any, client: Any
) -> None:
    from tests.conftest import make_tenant

    model = create_model(tenant, engine)
    path = f"/v1/models/{model.name}/markers"
    body = {"at": "2026-10-01T00:00:00Z", "text": "supplier change"}
    c = tenant.client
    for scope in ("read", "ingest"):
        assert c.post(path, json=body, headers=tenant.headers(scope)).status_code == 403
    assert c.get(path, headers=tenant.headers("ingest")).status_code == 403
    assert c.get(path, headers=tenant.headers("admin")).status_code == 403
    assert c.get(path, params={"start": "soon"}).status_code == 422
    r = c.get(path, params={"start": "2026-10-02T00:00:00Z", "end": "2026-10-01T00:00:00Z"})
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "start"
    made = c.post(path, json=body).json()
    assert _markers(engine, model) == 1
    other = make_tenant(sessions, client)
    assert other.client.get(path).status_code == 404
    assert other.client.post(path, json=body).status_code == 404
    assert other.client.delete(f"{path}/{made['id']}").status_code == 404
    assert _markers(engine, model) == 1
