"""The dashboard's data: an online furniture shop's returns model, two weeks of orders.

Seeded numpy (SEED): PER_DAY orders a day for DAYS days from FIRST_DAY, scores Beta(2, 4),
each outcome drawn with the score as its probability, so the scores are calibrated by
construction; label delays exponential with a mean of MEAN_DELAY_DAYS days, a share NEVER of
outcomes never reported, and only outcomes learnt by NOW are sent.
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

NOW = datetime(2026, 3, 16, 9, 30, tzinfo=UTC)
FIRST_DAY = datetime(2026, 3, 2, tzinfo=UTC)
DAYS, PER_DAY, SEED = 14, 60, 20260316
MEAN_DELAY_DAYS, NEVER = 3.0, 0.05
LABEL_DELAY_DAYS, MIN_COVERAGE = 10, 0.9
WINDOWS = DAYS + 1  # the range runs to the end of NOW's day, which has no order


@dataclass(frozen=True)
class Order:
    """One scored order and, when it has arrived by NOW, the time its outcome was learnt."""

    id: str
    ts: datetime
    score: float
    actual: str
    label_at: datetime | None

    @property
    def day(self) -> int:
        """Index of the order's day from FIRST_DAY."""
        return (self.ts - FIRST_DAY).days


def shop_orders() -> list[Order]:
    """Two weeks of orders (see the module docstring for the distributions)."""
    rng = np.random.default_rng(SEED)
    out = []
    for d in range(DAYS):
        for k in range(PER_DAY):
            ts = FIRST_DAY + timedelta(days=d, minutes=int(rng.integers(0, 1440)))
            # scores sit half-way between thousandths, off the 1/100 threshold edges
            score = min(round(float(rng.beta(2, 4)), 3), 0.998) + 0.0005
            actual = "1" if rng.random() < score else "0"
            arrives = ts + timedelta(days=float(rng.exponential(MEAN_DELAY_DAYS)))
            told = rng.random() >= NEVER and arrives <= NOW
            out.append(Order(f"order-{d}-{k}", ts, score, actual, arrives if told else None))
    return out


def send_shop(tenant: Any, engine: Engine, orders: list[Order]) -> str:
    """Create the returns model and send the orders and the outcomes known by NOW."""
    model = create_model(
        tenant, engine, label_delay_days=LABEL_DELAY_DAYS, min_coverage=MIN_COVERAGE
    )
    http, ingest = tenant.client, tenant.headers("ingest")
    r = http.post(
        f"/v1/models/{model.name}/predictions",
        headers=ingest,
        json={"predictions": [{"id": o.id, "ts": stamp(o.ts), "score": o.score} for o in orders]},
    )
    assert r.status_code == 200, r.text
    r = http.post(
        f"/v1/models/{model.name}/labels",
        headers=ingest,
        json={
            "labels": [
                {"id": o.id, "actual": o.actual, "ts": stamp(o.label_at)}
                for o in orders
                if o.label_at
            ]
        },
    )
    assert r.status_code == 200, r.text
    return model.name


def raise_alert(tenant: Any, sessions: Any, name: str) -> str:
    """A precision floor no day meets, evaluated once at NOW; returns the rule id."""
    r = tenant.client.post(
        f"/v1/models/{name}/rules",
        headers=tenant.headers("admin"),
        json={"kind": "floor", "measure": "precision", "threshold": 0.99, "min_support": 1},
    )
    assert r.status_code == 201, r.text
    with transaction(sessions) as session:
        rule = session.get(Rule, r.json()["id"])
        evaluate_rule(session, rule, session.get(ModelRow, rule.model_id), NOW, 100)
    return str(r.json()["id"])


def by_day(orders: list[Order]) -> dict[int, list[Order]]:
    """Orders grouped by day index."""
    out: dict[int, list[Order]] = {}
    for o in orders:
        out.setdefault(o.day, []).append(o)
    return out
