"""A furniture shop's returns model with a region tag, for the dashboard's views of change.

Seeded numpy (SEED): PER_DAY orders a day for DAYS days from FIRST_DAY, each in one of
REGIONS (uniform), scores Beta(2, 4). An order comes back with probability equal to its
score, except in the north from CHANGE_DAY on (a new sofa supplier), where it comes back with
probability 0.3 x score, so the north's precision falls. Every outcome is learnt exactly
DELAY after the order; NOW is early on the day after the last, so every day but the last is
fully labelled (settled) and the last is about half labelled (not settled).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import Engine

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.tables import Rule
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.support.builders import stamp
from tests.support.models import create_model

FIRST_DAY = datetime(2026, 5, 4, tzinfo=UTC)
DAYS, PER_DAY, SEED, CHANGE_DAY = 40, 160, 20260504, 21
REGIONS = ("east", "north", "south", "west")
DELAY = timedelta(hours=12)
NOW = FIRST_DAY + timedelta(days=DAYS, hours=1)
THRESHOLD = 0.5


@dataclass(frozen=True)
class Order:
    """One scored order with its region and outcome."""

    id: str
    ts: datetime
    score: float
    region: str
    actual: int

    @property
    def day(self) -> int:
        """Index of the order's day from FIRST_DAY."""
        return (self.ts - FIRST_DAY).days

    @property
    def label_at(self) -> datetime:
        """When the outcome is learnt."""
        return self.ts + DELAY


def orders() -> list[Order]:
    """The orders (see the module docstring for the distributions)."""
    rng = np.random.default_rng(SEED)
    out = []
    for d in range(DAYS):
        for k in range(PER_DAY):
            ts = FIRST_DAY + timedelta(days=d, minutes=int(rng.integers(0, 1440)))
            score = round(float(rng.beta(2, 4)), 4)
            region = REGIONS[int(rng.integers(0, len(REGIONS)))]
            p = score * (0.3 if region == "north" and d >= CHANGE_DAY else 1.0)
            out.append(Order(f"o-{d}-{k}", ts, score, region, int(rng.random() < p)))
    return out


def send(tenant: Any, engine: Engine, data: list[Order], **fields: Any) -> str:
    """Create the model (region admitted as a tag key) and send the orders and the outcomes
    learnt by NOW."""
    fields = {"label_delay_days": 7, "min_coverage": 0.9, "segment_keys": ["region"], **fields}
    model = create_model(tenant, engine, **fields)
    http, ingest = tenant.client, tenant.headers("ingest")
    r = http.post(
        f"/v1/models/{model.name}/predictions",
        headers=ingest,
        json={
            "predictions": [
                {"id": o.id, "ts": stamp(o.ts), "score": o.score, "tags": {"region": o.region}}
                for o in data
            ]
        },
    )
    assert r.status_code == 200, r.text
    told = [o for o in data if o.label_at <= NOW]
    r = http.post(
        f"/v1/models/{model.name}/labels",
        headers=ingest,
        json={
            "labels": [{"id": o.id, "actual": str(o.actual), "ts": stamp(o.label_at)} for o in told]
        },
    )
    assert r.status_code == 200, r.text
    return model.name


def raise_north(tenant: Any, sessions: Any, name: str) -> str:
    """A weekly precision floor (0.4) per region with a fixed baseline from day 7 to day 14,
    evaluated once at NOW: only the north breaches, from the week of CHANGE_DAY. Returns the
    rule's id."""
    r = tenant.client.post(
        f"/v1/models/{name}/rules",
        headers=tenant.headers("admin"),
        json={
            "kind": "floor",
            "measure": "precision",
            "granularity": "week",
            "threshold": 0.4,
            "min_support": 1,
            "segment_by": "region",
            "baseline": {
                "start": stamp(FIRST_DAY + timedelta(days=7)),
                "end": stamp(FIRST_DAY + timedelta(days=14)),
            },
        },
    )
    assert r.status_code == 201, r.text
    with transaction(sessions) as session:
        rule = session.get(Rule, r.json()["id"])
        evaluate_rule(session, rule, session.get(ModelRow, rule.model_id), NOW, 100)
    return str(r.json()["id"])
