"""Tokens and scopes: 401 without a live token, 403 without the scope, 404 across projects,
on every /v1 route the app serves; keys are created hashed and revoked."""

from __future__ import annotations

import hashlib
import math
import os
import re
import secrets
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.routing import APIRoute
from sqlalchemy import Engine

from tests.conftest import Tenant, make_tenant
from tests.support import Model, count, create_model, label, predictions, rows

SCOPES = ("admin", "ingest", "read")
# Every route the DESIGN's API table names today; the walk below must find at least these.
KNOWN = {
    ("POST", "/v1/models"),
    ("GET", "/v1/models"),
    ("GET", "/v1/models/{model}"),
    ("PATCH", "/v1/models/{model}"),
    ("DELETE", "/v1/models/{model}"),
    ("POST", "/v1/models/{model}/predictions"),
    ("POST", "/v1/models/{model}/labels"),
    ("PUT", "/v1/models/{model}/rollups"),
    ("POST", "/v1/keys"),
    ("DELETE", "/v1/keys/{key_id}"),
}


def required_scope(method: str, path: str) -> str:
    """The scope the DESIGN's API table gives a route."""
    if path.startswith(("/v1/keys", "/v1/webhooks")):
        return "admin"
    if method == "GET":
        return "read"
    if method == "POST" and path.endswith(("/predictions", "/labels")):
        return "ingest"
    if method == "PUT" and path.endswith("/rollups"):  # a lake-fed model's uploads
        return "ingest"
    return "admin"


def walk(routes: list[Any], prefix: str = "") -> Iterator[tuple[str, str]]:
    """(method, path) of every API route, descending into included routers."""
    for route in routes:
        inner = getattr(route, "original_router", None)
        if inner is not None:
            yield from walk(inner.routes, prefix + route.include_context.prefix)
        elif isinstance(route, APIRoute):
            for method in sorted(route.methods):
                yield method, prefix + route.path


def v1_routes(app: Any) -> list[tuple[str, str]]:
    """The /v1 routes of the app (create_app wraps FastAPI in the body-limit middleware)."""
    fastapi_app = getattr(app, "app", app)
    found = sorted({r for r in walk(fastapi_app.routes) if r[1].startswith("/v1/")})
    assert KNOWN <= set(found), KNOWN - set(found)
    return found


def fill(path: str, model: str) -> str:
    """A concrete URL for a route path."""
    return re.sub(r"\{[^}]+\}", "1", path.replace("{model}", model))


def call(tenant: Tenant, method: str, url: str, headers: dict[str, str]) -> Any:
    """Send a request with exactly these headers (never the client's default token)."""
    body = {} if method in ("POST", "PATCH", "PUT") else None
    request = tenant.client.build_request(method, url, json=body, headers=headers)
    if "Authorization" not in headers:
        del request.headers["Authorization"]
    return tenant.client.send(request)


@pytest.fixture()
def victim(tenant: Tenant, engine: Engine, sessions: Any) -> tuple[Tenant, Model]:
    """Another project, with a model holding predictions and a label."""
    other = make_tenant(sessions, tenant.client)
    tenant.client.headers["Authorization"] = f"Bearer {tenant.tokens['admin,ingest,read']}"
    model = create_model(other, engine)
    items = predictions(3)
    h = other.headers("ingest")
    assert (
        other.client.post(
            f"/v1/models/{model.name}/predictions", json={"predictions": items}, headers=h
        ).status_code
        == 200
    )
    assert (
        other.client.post(
            f"/v1/models/{model.name}/labels",
            json={"labels": [label(items[0]["id"], "1")]},
            headers=h,
        ).status_code
        == 200
    )
    return other, model


def assert_untouched(engine: Engine, model: Model) -> None:
    """The victim's rows are exactly as the fixture left them."""
    assert count(engine, "predictions", model.id) == 3
    assert count(engine, "labels", model.id) == 1
    assert rows(engine, "SELECT count(*) FROM models WHERE id = :m", m=model.id)[0][0] == 1


def test_every_v1_route_refuses_missing_and_wrong_tokens(
    tenant: Tenant, app: Any, engine: Engine, victim: tuple[Tenant, Model]
) -> None:
    _, model = victim
    wrong = "blt_" + secrets.token_urlsafe(32)
    for method, path in v1_routes(app):
        url = fill(path, model.name)
        for headers in (
            {},
            {"Authorization": f"Bearer {wrong}"},
            {"Authorization": f"Basic {tenant.tokens['admin,ingest,read']}"},
            {"Authorization": "Bearer "},
        ):
            r = call(tenant, method, url, headers)
            assert r.status_code == 401, (method, path, headers, r.text)
            assert r.headers["content-type"].startswith("application/problem+json")
            assert r.headers["www-authenticate"].startswith("Bearer")
    assert_untouched(engine, model)


def test_every_v1_route_needs_its_own_scope(
    tenant: Tenant, app: Any, engine: Engine, victim: tuple[Tenant, Model]
) -> None:
    """Scopes are independent, and checked before the model is looked up."""
    _, model = victim
    for method, path in v1_routes(app):
        need = required_scope(method, path)
        url = fill(path, model.name)
        for scope in SCOPES:
            r = call(tenant, method, url, tenant.headers(scope))
            if scope == need:
                assert r.status_code not in (401, 403), (method, path, scope, r.text)
            else:
                assert r.status_code == 403, (method, path, scope, r.text)
                assert need in r.json()["detail"]
    assert_untouched(engine, model)


def test_another_projects_model_is_404(
    tenant: Tenant, app: Any, engine: Engine, victim: tuple[Tenant, Model]
) -> None:
    other, model = victim
    everything = tenant.headers("admin", "ingest", "read")
    model_routes = [(m, p) for m, p in v1_routes(app) if "{model}" in p]
    for method, path in model_routes:
        url = fill(path, model.name)
        if method in ("GET", "DELETE"):
            r = call(tenant, method, url, everything)
            assert r.status_code == 404, (method, path, r.text)
    sends = {
        ("PATCH", ""): {"threshold": 0.1},
        ("POST", "/predictions"): {"predictions": predictions(2, start=10)},
        ("POST", "/labels"): {"labels": [label("order-0", "0")]},
    }
    for (method, tail), body in sends.items():
        r = tenant.client.request(
            method, f"/v1/models/{model.name}{tail}", json=body, headers=everything
        )
        assert r.status_code == 404, (method, tail, r.text)
    assert_untouched(engine, model)
    assert count(engine, "threshold_changes", model.id) == 1
    assert (
        other.client.get(f"/v1/models/{model.name}", headers=other.headers("read")).status_code
        == 200
    )


def token_rows(engine: Engine, project_id: int) -> list[Any]:
    """Every column of the project's tokens."""
    return rows(engine, "SELECT * FROM tokens WHERE project_id = :p", p=project_id)


def test_a_created_key_works_and_only_its_hash_is_stored(tenant: Tenant, engine: Engine) -> None:
    r = tenant.client.post(
        "/v1/keys",
        json={"scopes": ["read"], "name": "stock dashboard"},
        headers=tenant.headers("admin"),
    )
    assert r.status_code == 201
    made = r.json()
    token = made["token"]
    assert made["scopes"] == ["read"] and made["name"] == "stock dashboard"
    auth = {"Authorization": f"Bearer {token}"}
    assert call(tenant, "GET", "/v1/models", auth).status_code == 200
    assert call(tenant, "POST", "/v1/models", auth).status_code == 403
    stored = token_rows(engine, tenant.project_id)
    mine = [r for r in stored if r._mapping["id"] == made["id"]]
    assert len(mine) == 1
    assert mine[0]._mapping["token_hash"] == hashlib.sha256(token.encode()).hexdigest()
    for row in stored:
        for value in row:
            assert token not in str(value)
            assert token[-20:] not in str(value)


@pytest.mark.parametrize(
    "body",
    [
        {"scopes": ["write"]},
        {"scopes": []},
        {},
        {"scopes": ["read"], "owner": "x"},
        {"scopes": ["read"], "name": "stock\u0000"},
    ],
    ids=["unknown-scope", "no-scopes", "missing", "extra-field", "name-with-nul"],
)
def test_a_bad_key_request_is_422_and_stores_nothing(
    tenant: Tenant, engine: Engine, body: dict[str, Any]
) -> None:
    before = len(token_rows(engine, tenant.project_id))
    r = tenant.client.post("/v1/keys", json=body, headers=tenant.headers("admin"))
    assert r.status_code == 422
    assert len(token_rows(engine, tenant.project_id)) == before


def test_a_revoked_key_is_401(tenant: Tenant, engine: Engine, sessions: Any) -> None:
    admin = tenant.headers("admin")
    made = tenant.client.post("/v1/keys", json={"scopes": ["read", "ingest"]}, headers=admin).json()
    auth = {"Authorization": f"Bearer {made['token']}"}
    assert call(tenant, "GET", "/v1/models", auth).status_code == 200
    assert tenant.client.delete(f"/v1/keys/{made['id']}", headers=admin).status_code == 204
    assert call(tenant, "GET", "/v1/models", auth).status_code == 401
    (revoked,) = rows(engine, "SELECT revoked_at FROM tokens WHERE id = :i", i=made["id"])
    assert revoked[0] is not None
    assert tenant.client.delete(f"/v1/keys/{made['id']}", headers=admin).status_code == 404
    # one project cannot revoke another's key
    other = make_tenant(sessions, tenant.client)
    theirs = tenant.client.post(
        "/v1/keys", json={"scopes": ["read"]}, headers=other.headers("admin")
    ).json()
    assert tenant.client.delete(f"/v1/keys/{theirs['id']}", headers=admin).status_code == 404
    assert (
        call(
            tenant, "GET", "/v1/models", {"Authorization": f"Bearer {theirs['token']}"}
        ).status_code
        == 200
    )


def test_tokens_carry_at_least_128_random_bits(tenant: Tenant) -> None:
    """Bits = characters after the shared prefix × log2(distinct symbols seen in them)."""
    made = [
        tenant.client.post(
            "/v1/keys", json={"scopes": ["read"]}, headers=tenant.headers("admin")
        ).json()["token"]
        for _ in range(40)
    ]
    assert len(set(made)) == len(made)
    prefix = os.path.commonprefix(made)
    bodies = [t[len(prefix) :] for t in made]
    symbols = set("".join(bodies))
    shortest = min(len(b) for b in bodies)
    assert shortest * math.log2(len(symbols)) >= 128, (prefix, shortest, len(symbols))
