"""Builders for alert tests: a returns model fed day by day with stated distributions.

Scores: actual positives score U(0.5, 1) with probability `recall` else U(0, 0.5); actual
negatives score U(0.55, 1) with probability 0.05 else U(0, 0.55); the threshold is 0.5.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

import numpy as np


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


def send(
    client: Any, model: str, preds: list[dict[str, Any]], labels: list[dict[str, Any]]
) -> None:
    """Post predictions then labels in batches, checking each answer."""
    for i in range(0, len(preds), 5000):
        r = client.post(
            f"/v1/models/{model}/predictions", json={"predictions": preds[i : i + 5000]}
        )
        assert r.status_code == 200, r.text
    for i in range(0, len(labels), 5000):
        r = client.post(f"/v1/models/{model}/labels", json={"labels": labels[i : i + 5000]})
        assert r.status_code == 200, r.text
