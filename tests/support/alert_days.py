"""Builders for alert tests: a returns model fed day by day with stated distributions.

`START` is the first day, `DROP_RULE` a recall drop rule, `returns_model` creates the model
(label_delay_days 2, min_coverage 0.9) and `feed` sends days `first..last-1` of 300 positives
and 900 negatives each.

Scores: actual positives score U(0.5, 1) with probability `recall` else U(0, 0.5); actual
negatives score U(0.55, 1) with probability 0.05 else U(0, 0.55); the threshold is 0.5.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np

from tests.support.models import post_model
from tests.support.sending import send_both

START = datetime(2026, 11, 1, tzinfo=UTC)
DROP_RULE = {
    "kind": "drop",
    "measure": "recall",
    "tolerance": 0.02,
    "alpha": 0.05,
    "min_support": 50,
    "baseline": {"windows": 7},
    "clear_after": 2,
}


def day_rows(
    rng: np.random.Generator,
    day: datetime,
    *,
    positives: int,
    negatives: int,
    recall: float,
    prefix: str,
    region: str | None = None,
    label_share: float = 1.0,
    delay_hours: float = 6.0,
) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Predictions and labels of one day."""
    preds, labels = [], []
    ys = np.r_[np.ones(positives, bool), np.zeros(negatives, bool)]
    for i, y in enumerate(ys):
        if y:
            score = rng.uniform(0.5, 1) if rng.random() < recall else rng.uniform(0, 0.5)
        else:
            score = rng.uniform(0.55, 1) if rng.random() < 0.05 else rng.uniform(0, 0.55)
        ts = day + timedelta(seconds=int(rng.integers(0, 86_000)))
        pid = f"{prefix}-{day:%Y%m%d}-{i}"
        tags = {"region": region} if region else None
        preds.append({"id": pid, "ts": ts.isoformat(), "score": float(score), "tags": tags})
        if rng.random() < label_share:
            labels.append(
                {"id": pid, "actual": int(y), "ts": (ts + timedelta(hours=delay_hours)).isoformat()}
            )
    return preds, labels


def returns_model(client: Any, name: str = "returns-v2", **extra: Any) -> None:
    """The returns model the alert tests watch: outcomes due within 2 days, 90% coverage,
    unless `extra` says otherwise."""
    post_model(client, name, **{"label_delay_days": 2, "min_coverage": 0.9, **extra})


def feed(
    client: Any,
    rng: np.random.Generator,
    first: int,
    last: int,
    recall: float,
    model: str = "returns-v2",
    **kw: Any,
) -> None:
    """Send the days first..last-1 from START: 300 positives and 900 negatives a day."""
    for d in range(first, last):
        preds, labels = day_rows(
            rng,
            START + timedelta(days=d),
            positives=300,
            negatives=900,
            recall=recall,
            prefix="o",
            **kw,
        )
        send_both(client, model, preds, labels)
