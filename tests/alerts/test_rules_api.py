"""Rules over the API: creation, validation that refuses rules that cannot work, muting."""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import text

from tests.conftest import Tenant


@pytest.fixture()
def model(tenant: Tenant) -> str:
    body = {"name": "returns-v2", "segment_keys": ["region", "channel"]}
    assert tenant.client.post("/v1/models", json=body).status_code == 201
    return "returns-v2"


def _rule_count(engine: Any, tenant: Tenant) -> int:
    with engine.connect() as conn:
        return int(
            conn.execute(
                text(
                    "SELECT count(*) FROM rules r JOIN models m ON m.id = r.model_id "
                    "JOIN projects p ON p.id = m.project_id WHERE p.name = :p"
                ),
                {"p": tenant.name},
            ).scalar()
        )


@pytest.mark.parametrize(
    "body, field, words",
    [
        ({"kind": "drop", "measure": "bogus"}, "body", "unknown measure"),
        ({"kind": "shift", "measure": "recall", "threshold": 0.1}, "body", "needs labels"),
        ({"kind": "drop", "measure": "recall", "alpha": 1.5}, "alpha", "less than 1"),
        ({"kind": "drop", "measure": "recall", "alpha": 0}, "alpha", "greater than 0"),
        ({"kind": "floor", "measure": "precision"}, "body", "needs a threshold"),
        ({"kind": "traffic"}, "body", "low, high"),
        ({"kind": "traffic", "low": 10, "high": 5}, "body", "low must not exceed high"),
        ({"kind": "sometimes", "measure": "recall"}, "kind", ""),
        ({"kind": "drop", "measure": "recall", "baseline": {"windows": 0}}, "baseline.windows", ""),
        # a rule that could never fire: no interval for a confident floor
        (
            {
                "kind": "floor",
                "measure": "average_precision",
                "threshold": 0.5,
                "mode": "confident",
            },
            "body",
            "no interval",
        ),
        (
            {
                "kind": "floor",
                "measure": "implied.precision",
                "threshold": 0.5,
                "mode": "confident",
            },
            "body",
            "no interval",
        ),
    ],
)
def test_a_rule_that_cannot_work_is_refused_and_nothing_is_stored(
    tenant: Tenant, model: str, engine: Any, body: dict[str, Any], field: str, words: str
) -> None:
    r = tenant.client.post(f"/v1/models/{model}/rules", json=body)
    assert r.status_code == 422
    problem = r.json()
    assert r.headers["content-type"].startswith("application/problem+json")
    assert problem["errors"][0]["field"] == field
    assert words.lower() in (problem["errors"][0]["reason"] + problem["detail"]).lower()
    assert _rule_count(engine, tenant) == 0


def test_create_list_patch_mute_retire(tenant: Tenant, model: str, engine: Any) -> None:
    c = tenant.client
    rule = c.post(
        f"/v1/models/{model}/rules",
        json={"kind": "drop", "measure": "fbeta", "tolerance": 0.05, "segment_by": "region"},
    ).json()
    assert rule["alpha"] == 0.05 and rule["baseline"] == {"windows": 7} and not rule["muted"]
    listed = c.get(f"/v1/models/{model}/rules").json()["items"]
    assert [x["id"] for x in listed] == [rule["id"]]
    muted = c.patch(
        f"/v1/models/{model}/rules/{rule['id']}", json={"muted_until": "2999-01-01T00:00:00Z"}
    ).json()
    assert muted["muted"] is True and muted["muted_until"].startswith("2999-01-01")
    bad = c.patch(f"/v1/models/{model}/rules/{rule['id']}", json={"measure": "nope"})
    assert bad.status_code == 422
    assert c.get(f"/v1/models/{model}/rules/{rule['id']}").json()["measure"] == "fbeta"
    assert c.delete(f"/v1/models/{model}/rules/{rule['id']}").status_code == 204
    # deleting retires: the row stays, out of the default list, in the list of retired ones
    assert _rule_count(engine, tenant) == 1
    assert c.get(f"/v1/models/{model}/rules").json()["items"] == []
    retired = c.get(f"/v1/models/{model}/rules", params={"retired": "true"}).json()["items"]
    assert [x["id"] for x in retired] == [rule["id"]] and retired[0]["retired_at"]
    assert c.get(f"/v1/models/{model}/rules/{rule['id']}").json()["retired_at"]
    again = c.patch(f"/v1/models/{model}/rules/{rule['id']}", json={"tolerance": 0.1})
    assert again.status_code == 409 and "retired" in again.json()["detail"]
    assert c.delete(f"/v1/models/{model}/rules/{rule['id']}").status_code == 204  # idempotent


def test_traffic_is_the_only_name_of_the_count_rule(tenant: Tenant, model: str) -> None:
    r = tenant.client.post(f"/v1/models/{model}/rules", json={"kind": "volume", "low": 1})
    assert r.status_code == 422 and "kind" in r.text
    r = tenant.client.post(f"/v1/models/{model}/rules", json={"kind": "traffic", "low": 1})
    assert r.status_code == 201 and r.json()["kind"] == "traffic"


def test_scopes_on_rule_routes(tenant: Tenant, model: str) -> None:
    c = tenant.client
    body = {"kind": "traffic", "low": 1}
    r = c.post(f"/v1/models/{model}/rules", json=body, headers=tenant.headers("read"))
    assert r.status_code == 403
    r = c.get(f"/v1/models/{model}/rules", headers=tenant.headers("admin"))
    assert r.status_code == 403
    r = c.get("/v1/alerts", headers={"Authorization": "Bearer nope"})
    assert r.status_code == 401
