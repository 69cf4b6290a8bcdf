"""Scores that lie exactly on a bin edge k/100, or one float step to either side of it, are
binned as "score >= k/100" decides: GET /thresholds equals scikit-learn's confusion counts at
every threshold k/100, on both stores.

Before binning compared with the edges, 0.29, 0.57 and 0.58 (among others) fell one bin low
(0.29 * 100 is 28.999...), so the sweep disagreed with "score >= threshold" there.
The smallest positive score (a subnormal double) is among them: its square underflows, which
PostgreSQL reports as an error unless the Brier term guards it. Outcomes are seeded coin
flips (invented data); the reference is `sklearn.metrics.confusion_matrix`.
"""

from __future__ import annotations

from datetime import timedelta

import numpy as np
from sklearn.metrics import confusion_matrix
from sqlalchemy import Engine

from tests.conftest import Tenant
from tests.support import base_time, create_model, label, stamp


def _edge_scores() -> np.ndarray:
    scores = []
    for k in range(101):
        edge = k / 100
        scores += [edge, float(np.nextafter(edge, 2.0)), float(np.nextafter(edge, -1.0))]
    return np.array([s for s in scores if 0.0 <= s <= 1.0])


def test_every_threshold_k_over_100_equals_sklearn_on_edge_scores(
    tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    scores = _edge_scores()
    y = np.random.default_rng(29).integers(0, 2, scores.size)
    t0 = base_time()
    items = [
        {"id": f"e{i}", "ts": stamp(t0 + timedelta(seconds=i)), "score": float(s)}
        for i, s in enumerate(scores)
    ]
    r = tenant.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": items})
    assert r.status_code == 200, r.text
    labels = [label(f"e{i}", int(a)) for i, a in enumerate(y)]
    r = tenant.client.post(f"/v1/models/{model.name}/labels", json={"labels": labels})
    assert r.status_code == 200, r.text
    r = tenant.client.get(
        f"/v1/models/{model.name}/thresholds",
        params={"start": stamp(t0), "end": stamp(t0 + timedelta(hours=1))},
    )
    assert r.status_code == 200, r.text
    rows = r.json()["sweep"]
    assert len(rows) == 100
    for k, row in enumerate(rows):
        tn, fp, fn, tp = confusion_matrix(y, scores >= k / 100, labels=[0, 1]).ravel()
        assert (row["tp"], row["fp"], row["fn"], row["tn"]) == (tp, fp, fn, tn), k
