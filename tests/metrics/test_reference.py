"""The model's `reference` period: refused with 422 (and nothing changed) when it holds no
settled labelled data; once set, the implied measures take its prevalence as the training
prior.

Data: the breast cancer dataset that scikit-learn ships (Wolberg, Street and Mangasarian
1995), scored and spread over 24 days with seeded delays (tests/support/datasets.py); the
expected prevalence is counted on the scenario's own rows.
"""

from __future__ import annotations

from datetime import timedelta

import pytest
from sqlalchemy import Engine

from tests.conftest import Tenant
from tests.support import create_model
from tests.support.datasets import NOW, START, breast_cancer, in_range, ingest, stamp


def test_a_reference_without_settled_labels_is_refused_and_nothing_changes(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    body = {"name": "returns-ref", "reference": {"start": stamp(START), "end": stamp(NOW)}}
    r = tenant.client.post("/v1/models", json=body, headers=tenant.headers("admin"))
    assert r.status_code == 422, r.text
    assert r.json()["errors"][0]["field"] == "reference"
    assert tenant.client.get("/v1/models/returns-ref").status_code == 404  # nothing stored
    model = create_model(tenant, engine)  # label delay 30 days: nothing is settled yet
    ingest(tenant.client, model.name, breast_cancer(), NOW)
    r = tenant.client.patch(
        f"/v1/models/{model.name}",
        json={"reference": {"start": stamp(START), "end": stamp(START + timedelta(days=10))}},
        headers=tenant.headers("admin"),
    )
    assert r.status_code == 422, r.text
    problem = r.json()
    assert problem["errors"][0]["field"] == "reference"
    assert "no settled labelled data" in problem["errors"][0]["reason"]
    assert tenant.client.get(f"/v1/models/{model.name}").json()["reference"] is None


def test_the_implied_measures_take_the_reference_prevalence(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine, label_delay_days=2)
    ingest(tenant.client, model.name, sc, NOW)
    lo, hi = START, START + timedelta(days=10)
    r = tenant.client.patch(
        f"/v1/models/{model.name}",
        json={"reference": {"start": stamp(lo), "end": stamp(hi)}},
        headers=tenant.headers("admin"),
    )
    assert r.status_code == 200, r.text
    assert r.json()["reference"] == {"start": stamp(lo), "end": stamp(hi)}
    windows = tenant.client.get(
        f"/v1/models/{model.name}/metrics", params={"start": stamp(START + timedelta(days=20))}
    ).json()["windows"]
    known = in_range(sc.ts, lo, hi) & sc.known(NOW)
    for w in windows:
        ref = w["implied"]["reference"]
        assert (ref["start"], ref["end"]) == (stamp(lo), stamp(hi))
        assert ref["prevalence"] == pytest.approx(sc.actual[known].mean(), rel=1e-12)
        assert ref["labelled"] == int(known.sum())
