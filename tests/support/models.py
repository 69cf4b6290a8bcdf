"""Models created over the API, and their row ids for SQL reads."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine, text

from tests.support.builders import unique_name


def model_body(name: str | None = None, **fields: Any) -> dict[str, Any]:
    """A POST /v1/models body; only the given settings are sent."""
    return {"name": name or unique_name(), **fields}


@dataclass(frozen=True)
class Model:
    """A model created through the API, with its row id for SQL counts."""

    name: str
    id: int


def model_id(engine: Engine, project_id: int, name: str) -> int:
    """The row id of a project's model."""
    with engine.connect() as conn:
        return int(
            conn.execute(
                text("SELECT id FROM models WHERE project_id = :p AND name = :n"),
                {"p": project_id, "n": name},
            ).scalar_one()
        )


def create_model(tenant: Any, engine: Engine, **fields: Any) -> Model:
    """Create a model over the API (all-scopes token) and look up its id."""
    body = model_body(**fields)
    r = tenant.client.post("/v1/models", json=body, headers=tenant.headers("admin"))
    assert r.status_code == 201, r.text
    return Model(body["name"], model_id(engine, tenant.project_id, body["name"]))


def post_model(client: Any, name: str, **fields: Any) -> dict[str, Any]:
    """Create a model named `name` with the client's own token; must be a 201."""
    r = client.post("/v1/models", json={"name": name, **fields})
    assert r.status_code == 201, r.text
    return dict(r.json())
