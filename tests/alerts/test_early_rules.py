"""`early` over the rules API: kept and shown when it can mean something, refused with a 422
saying why where it cannot (no labels to wait for, or no projected value), nothing stored."""

from __future__ import annotations

import json
from typing import Any

import pytest
from sqlalchemy import text

from tests.conftest import Tenant


@pytest.fixture()
def model(tenant: Tenant) -> str:
    assert tenant.client.post("/v1/models", json={"name": "returns-v2"}).status_code == 201
    return "returns-v2"


def _stored(engine: Any, tenant: Tenant) -> list[tuple[str, Any]]:
    """(kind, settings) of the project's rules, as stored."""
    with engine.connect() as conn:
        rows = conn.execute(
            text(
                "SELECT r.kind, r.settings FROM rules r JOIN models m ON m.id = r.model_id "
                "JOIN projects p ON p.id = m.project_id WHERE p.name = :p "
                "ORDER BY r.created_at, r.id"
            ),
            {"p": tenant.name},
        ).all()
    return [(k, s if isinstance(s, dict) else json.loads(s)) for k, s in rows]


@pytest.mark.parametrize(
    "body, words",
    [
        ({"kind": "traffic", "low": 100}, "no labels to wait for"),
        ({"kind": "stall", "threshold": 0.5}, "no labels to wait for"),
        ({"kind": "shift", "measure": "score_psi", "threshold": 0.2}, "no labels to wait for"),
        ({"kind": "drop", "measure": "positive_rate"}, "needs no labels"),
        ({"kind": "floor", "measure": "implied.recall", "threshold": 0.5}, "needs no labels"),
        ({"kind": "drop", "measure": "mcc"}, "no projected value"),
        ({"kind": "drop", "measure": "roc_auc"}, "no projected value"),
        ({"kind": "floor", "measure": "average_precision", "threshold": 0.5}, "no projected"),
    ],
)
def test_early_where_it_cannot_mean_anything_is_refused_and_nothing_is_stored(
    tenant: Tenant, model: str, engine: Any, body: dict[str, Any], words: str
) -> None:
    r = tenant.client.post(f"/v1/models/{model}/rules", json={**body, "early": True})
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    reason = r.json()["errors"][0]["reason"]
    assert reason.startswith("early: ") and words in reason, reason
    assert _stored(engine, tenant) == []
    # the same rule without early is fine
    assert tenant.client.post(f"/v1/models/{model}/rules", json=body).status_code == 201


def test_early_is_kept_shown_and_refused_on_a_change_that_cannot_take_it(
    tenant: Tenant, model: str, engine: Any
) -> None:
    c = tenant.client
    plain = c.post(f"/v1/models/{model}/rules", json={"kind": "drop", "measure": "recall"})
    assert plain.status_code == 201 and plain.json()["early"] is False
    body = {"kind": "drop", "measure": "recall", "early": True, "tolerance": 0.02}
    ruled = c.post(f"/v1/models/{model}/rules", json=body)
    assert ruled.status_code == 201 and ruled.json()["early"] is True
    rid = ruled.json()["id"]
    assert c.get(f"/v1/models/{model}/rules/{rid}").json()["early"] is True
    before = _stored(engine, tenant)
    assert before[1][1]["early"] is True
    # moving the early rule to a measure without a projected value is refused, unchanged
    r = c.patch(f"/v1/models/{model}/rules/{rid}", json={"measure": "balanced_accuracy"})
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "early", r.text
    assert "no projected value" in r.json()["errors"][0]["reason"]
    # and so is turning it on for a kind that waits for no labels
    traffic = c.post(f"/v1/models/{model}/rules", json={"kind": "traffic", "low": 10}).json()
    r = c.patch(f"/v1/models/{model}/rules/{traffic['id']}", json={"early": True})
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "early", r.text
    assert _stored(engine, tenant)[:2] == before
    assert c.get(f"/v1/models/{model}/rules/{traffic['id']}").json()["early"] is False
    off = c.patch(f"/v1/models/{model}/rules/{rid}", json={"early": False})
    assert off.status_code == 200 and off.json()["early"] is False
