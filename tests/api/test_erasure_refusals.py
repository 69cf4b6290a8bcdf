"""Refused erasures remove nothing: a bad body, too many ids, an unknown model, a token
without the admin scope. Each refusal is a problem (RFC 9457) naming what to fix, and
every table and rollup of the model reads the same after it."""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import Engine

from belated.store import refresh
from tests.conftest import Tenant
from tests.support import counts, create_model, predictions, send, stored_rollups
from tests.support.datasets import assert_close


def _stored(engine: Engine, model_id: int) -> tuple[dict[str, int], dict[Any, Any]]:
    return counts(engine, model_id), stored_rollups(engine, model_id)


def _same(engine: Engine, model_id: int, before: Any) -> None:
    now = _stored(engine, model_id)
    assert now[0] == before[0]
    assert_close(now[1], before[1])


@pytest.fixture()
def filled(tenant: Tenant, engine: Engine, sessions: Any) -> tuple[str, int, list[str]]:
    """A model with 40 predictions, half of them labelled, and a pending label."""
    model = create_model(tenant, engine)
    items = predictions(40)
    send(tenant.client, model.name, "predictions", items)
    labels = [{"id": p["id"], "actual": "1"} for p in items[:20]]
    send(tenant.client, model.name, "labels", [*labels, {"id": "waits", "actual": "0"}])
    refresh.refresh_all(sessions, max_values=100, model_id=model.id)
    return model.name, model.id, [p["id"] for p in items]


def _delete(tenant: Tenant, model: str, scopes: tuple[str, ...], **kw: Any) -> Any:
    return tenant.client.request(
        "DELETE", f"/v1/models/{model}/predictions", headers=tenant.headers(*scopes), **kw
    )


@pytest.mark.parametrize(
    ("body", "status", "field"),
    [
        (b"ids: a, b", 400, None),
        ({"id": ["a"]}, 422, "ids"),
        ({"ids": "a"}, 422, "ids"),
        ({"ids": []}, 422, "ids"),
        ({"ids": ["ok", None]}, 422, "id"),
        ({"ids": ["ok", "x" * 129]}, 422, "id"),
        ({"ids": ["ok", {"id": "a"}]}, 422, "id"),
    ],
)
def test_a_bad_body_is_refused_and_nothing_is_removed(
    tenant: Tenant,
    engine: Engine,
    filled: tuple[str, int, list[str]],
    body: Any,
    status: int,
    field: str | None,
) -> None:
    name, mid, ids = filled
    before = _stored(engine, mid)
    if isinstance(body, bytes):
        r = _delete(tenant, name, ("admin",), content=body)
    else:
        body = {k: ([ids[0], *v[1:]] if isinstance(v, list) and v else v) for k, v in body.items()}
        r = _delete(tenant, name, ("admin",), json=body)
    assert r.status_code == status, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    if field is not None:
        errors = r.json()["errors"]
        assert errors[0]["field"] == field, errors
        if field == "id":
            assert errors[0]["index"] == 1
    _same(engine, mid, before)


def test_too_many_ids_is_a_413_and_nothing_is_removed(
    tenant: Tenant, engine: Engine, filled: tuple[str, int, list[str]], settings: Any
) -> None:
    name, mid, ids = filled
    before = _stored(engine, mid)
    many = [*ids, *(f"other-{k}" for k in range(settings.max_batch))]
    r = _delete(tenant, name, ("admin",), json={"ids": many})
    assert r.status_code == 413, r.text
    assert "BELATED_MAX_BATCH" in r.json()["detail"]
    _same(engine, mid, before)


def test_an_unknown_model_and_tokens_without_admin_are_refused(
    tenant: Tenant, engine: Engine, filled: tuple[str, int, list[str]]
) -> None:
    name, mid, ids = filled
    before = _stored(engine, mid)
    r = _delete(tenant, "no-such-model", ("admin",), json={"ids": ids})
    assert r.status_code == 404 and "no-such-model" in r.json()["detail"]
    for scopes in (("read",), ("ingest",)):
        r = _delete(tenant, name, scopes, json={"ids": ids})
        assert r.status_code == 403 and "admin" in r.json()["detail"], r.text
    r = tenant.client.request(
        "DELETE", f"/v1/models/{name}/predictions", json={"ids": ids}, headers={"Authorization": ""}
    )
    assert r.status_code == 401
    _same(engine, mid, before)


def test_an_accepted_erasure_answers_what_it_removed(
    tenant: Tenant, engine: Engine, filled: tuple[str, int, list[str]]
) -> None:
    name, mid, ids = filled
    r = _delete(tenant, name, ("admin",), json={"ids": [ids[0], ids[30], "waits", "nobody"]})
    assert r.status_code == 200, r.text
    assert r.json() == {
        "erased": {"predictions": 2, "labels": 2, "pending_labels": 1},
        "not_found": ["nobody"],
        "expired": [],
    }
    after = counts(engine, mid)
    assert after["predictions"] == 38 and after["pending_labels"] == 0
    got = tenant.client.get(f"/v1/models/{name}").json()["counts"]
    assert got == {"predictions": 38, "labelled": 19, "pending_labels": 0}
