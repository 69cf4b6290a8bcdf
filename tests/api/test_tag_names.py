"""Names are checked: a tag filter, a rule's tag key or a floor threshold that cannot mean
what was typed is a 422 naming the parameter and the closest known names; nothing is stored."""

from __future__ import annotations

from typing import Any

import pytest
from sqlalchemy import Engine

from tests.conftest import Tenant
from tests.support import Model, create_model, predictions, rows

REGIONS = ("north", "south", "east")


@pytest.fixture()
def shop(tenant: Tenant, engine: Engine) -> Model:
    """A model with 30 orders tagged region (north, south, east) and channel (web, app)."""
    model = create_model(tenant, engine)
    batch = [
        {**p, "tags": {"region": REGIONS[i % 3], "channel": ("web", "app")[i % 2]}}
        for i, p in enumerate(predictions(30))
    ]
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 200, r.text
    return model


def _refused(r: Any, field: str) -> str:
    """The detail of a 422 problem whose first error names `field`."""
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    body = r.json()
    assert body["errors"][0]["field"] == field, body
    return str(body["detail"])


@pytest.mark.parametrize("path", ["metrics", "thresholds"])
@pytest.mark.parametrize(
    "params, field, named, closest",
    [
        ({"tag.region": "nrth"}, "tag.region", "nrth", "north"),
        ({"tag.region": "North"}, "tag.region", "North", "north"),
        ({"tag.regoin": "north"}, "tag.regoin", "regoin", "region"),
        ({"tag.colour": "red"}, "tag.colour", "colour", "channel"),  # none close: all listed
        ({"tag.region": "north", "tag.channel": "wbe"}, "tag.channel", "wbe", "web"),
    ],
)
def test_an_unknown_tag_is_refused_naming_the_closest_known_ones(
    tenant: Tenant,
    shop: Model,
    path: str,
    params: dict[str, str],
    field: str,
    named: str,
    closest: str,
) -> None:
    r = tenant.client.get(f"/v1/models/{shop.name}/{path}", params=params)
    detail = _refused(r, field)
    assert named in detail and closest in detail


def test_known_tags_filter_and_the_old_segment_parameter_is_gone(
    tenant: Tenant, shop: Model
) -> None:
    c = tenant.client
    both = c.get(
        f"/v1/models/{shop.name}/metrics",
        params={"tag.region": "north", "tag.channel": "web", "granularity": "week"},
    )
    assert both.status_code == 200, both.text
    assert both.json()["tags"] == {"region": "north", "channel": "web"}
    # orders 0..29: region north is i % 3 == 0, web is i % 2 == 0: i % 6 == 0, five of them
    assert sum(w["predictions"] for w in both.json()["windows"]) == 5
    old = c.get(f"/v1/models/{shop.name}/metrics", params={"segment": "region:north"})
    assert "tag.<key>=<value>" in _refused(old, "segment")


def _rule_count(engine: Engine, model: Model) -> int:
    return int(rows(engine, "SELECT count(*) FROM rules WHERE model_id = :m", m=model.id)[0][0])


@pytest.mark.parametrize(
    "body, field, words",
    [
        ({"kind": "traffic", "low": 1, "segment_by": "regoin"}, "segment_by", "region"),
        (
            {"kind": "drop", "measure": "recall", "tolerance": 0.05, "segment_by": "colour"},
            "segment_by",
            "colour",
        ),
        ({"kind": "shift", "measure": "tag_psi:chanel", "threshold": 0.2}, "measure", "channel"),
        ({"kind": "floor", "measure": "precision", "threshold": 70}, "threshold", "0.7"),
        ({"kind": "floor", "measure": "recall", "threshold": -0.1}, "threshold", "between 0"),
        ({"kind": "floor", "measure": "mcc", "threshold": 1.5}, "threshold", "-1 and 1"),
        ({"kind": "shift", "measure": "positive_rate", "threshold": 5}, "threshold", "(0, 1]"),
        ({"kind": "shift", "measure": "score_psi", "threshold": -1}, "threshold", "at least 0"),
    ],
)
def test_a_rule_on_a_name_or_scale_that_cannot_mean_it_is_refused_and_nothing_is_stored(
    tenant: Tenant, shop: Model, engine: Engine, body: dict[str, Any], field: str, words: str
) -> None:
    r = tenant.client.post(f"/v1/models/{shop.name}/rules", json=body)
    assert words in _refused(r, field)
    assert _rule_count(engine, shop) == 0


def test_rules_on_known_keys_are_accepted_and_a_change_to_an_unknown_one_is_refused(
    tenant: Tenant, shop: Model, engine: Engine
) -> None:
    c = tenant.client
    made = c.post(
        f"/v1/models/{shop.name}/rules",
        json={"kind": "shift", "measure": "tag_psi:region", "threshold": 0.2},
    )
    assert made.status_code == 201, made.text
    fan = c.post(
        f"/v1/models/{shop.name}/rules",
        json={"kind": "floor", "measure": "mcc", "threshold": -0.2, "segment_by": "channel"},
    )
    assert fan.status_code == 201, fan.text
    rule = fan.json()["id"]
    r = c.patch(f"/v1/models/{shop.name}/rules/{rule}", json={"segment_by": "chanel"})
    assert "channel" in _refused(r, "segment_by")
    r = c.patch(f"/v1/models/{shop.name}/rules/{rule}", json={"threshold": 2})
    assert "-1 and 1" in _refused(r, "threshold")
    stored = rows(engine, "SELECT settings FROM rules WHERE id = :i", i=rule)[0][0]
    assert "channel" in str(stored) and "chanel" not in str(stored) and "-0.2" in str(stored)
    assert _rule_count(engine, shop) == 2


def test_a_model_without_tags_refuses_tag_rules_unless_it_declares_its_keys(
    tenant: Tenant, engine: Engine
) -> None:
    bare = create_model(tenant, engine)
    r = tenant.client.post(
        f"/v1/models/{bare.name}/rules", json={"kind": "traffic", "low": 1, "segment_by": "region"}
    )
    assert "segment_keys" in _refused(r, "segment_by")
    assert _rule_count(engine, bare) == 0
    declared = create_model(tenant, engine, segment_keys=["region", "channel"])
    ok = tenant.client.post(
        f"/v1/models/{declared.name}/rules",
        json={"kind": "traffic", "low": 1, "segment_by": "region"},
    )
    assert ok.status_code == 201, ok.text
    typo = tenant.client.post(
        f"/v1/models/{declared.name}/rules",
        json={"kind": "shift", "measure": "tag_psi:regions", "threshold": 0.1},
    )
    assert "region" in _refused(typo, "measure")
    assert _rule_count(engine, declared) == 1
