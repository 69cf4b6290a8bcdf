"""Projected measures through the service, on both stores, against the values the windows
reach once their labels are in.

Seeded simulation (invented data, stated here): 120 days of 240 predictions a day; scores
Beta(0.6, 2.4) (mean 0.2), outcomes Bernoulli(score), so the scores are calibrated and the
prevalence is near 0.2; predicted positive when the score is at least 0.5. A positive's
label arrives after LogNormal(median 3 days, sigma 0.8), a negative's after LogNormal(median
20 days, sigma 0.8), and the same with the medians swapped (negatives first); the model
has `negative_after_days` 30, so a negative not labelled by then is implied. Labels
stamped after NOW are not sent. The curves are fitted by the service
on its own history (the older days); the unsettled days with 15% to 80% coverage are
scored against their final precision (every prediction's true class, as the window reads
once its labels are in).

Properties (DESIGN.md "Late labels"), as in the pure simulation of
tests/stats/test_projection.py (which runs 500+ windows): projected precision's mean
absolute error at most a third of the labelled-only precision's; projected recall no worse
than labelled-only recall + 0.01; and the projected 95% intervals hold the final value in
most windows (here 9 to 25 windows: at least 70% of them; the pure simulation checks 90%
over 500 windows).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from sqlalchemy import Engine

from belated.clock import clock
from tests.conftest import Tenant
from tests.support import create_model, send, stamp

SEED = 20261203
NOW = datetime(2026, 11, 30, 12, 0, tzinfo=UTC)
DAYS, PER_DAY = 120, 240


def _simulate(positives_first: bool) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(SEED)
    n = DAYS * PER_DAY
    day = np.repeat(np.arange(DAYS), PER_DAY)
    first = (NOW - timedelta(days=DAYS)).replace(hour=0, minute=0)
    ts = first.timestamp() + day * 86400 + rng.uniform(0, 86_000, n)
    score = rng.beta(0.6, 2.4, n)
    actual = (rng.random(n) < score).astype(int)
    fast, slow = (3.0, 20.0) if positives_first else (20.0, 3.0)
    median_days = np.where(actual == 1, fast, slow)
    delay_days = median_days * np.exp(0.8 * rng.standard_normal(n))
    return {"ts": ts, "score": score, "actual": actual, "label_at": ts + delay_days * 86400}


def _error(value: float | None, final: float) -> float:
    return float("nan") if value is None else abs(value - final)


@pytest.mark.slow
@pytest.mark.parametrize("positives_first", [True, False], ids=["returns-first", "kept-first"])
def test_projected_precision_tracks_the_final_values(
    tenant: Tenant, engine: Engine, positives_first: bool
) -> None:
    sim = _simulate(positives_first)
    clock.set(NOW)
    model = create_model(tenant, engine, label_delay_days=30, negative_after_days=30)
    at = sim["ts"]
    preds = [
        {
            "id": f"p{i}",
            "ts": stamp(datetime.fromtimestamp(float(at[i]), UTC)),
            "score": float(sim["score"][i]),
        }
        for i in range(len(at))
    ]
    send(tenant.client, model.name, "predictions", preds)
    known = sim["label_at"] <= NOW.timestamp()
    labels = [
        {
            "id": f"p{i}",
            "actual": str(int(sim["actual"][i])),
            "ts": stamp(datetime.fromtimestamp(float(sim["label_at"][i]), UTC)),
        }
        for i in np.flatnonzero(known)
    ]
    send(tenant.client, model.name, "labels", labels)
    start = NOW - timedelta(days=40)
    r = tenant.client.get(
        f"/v1/models/{model.name}/metrics",
        params={"granularity": "day", "start": stamp(start), "end": stamp(NOW)},
    )
    assert r.status_code == 200, r.text
    flagged = sim["score"] >= 0.5
    rows: list[tuple[float, float, float, float, float, float, float]] = []
    for w in r.json()["windows"]:
        if w["settled"] or not w["coverage"] or not 0.15 <= w["coverage"] <= 0.80:
            continue
        lo = datetime.fromisoformat(w["start"].replace("Z", "+00:00")).timestamp()
        inside = (at >= lo) & (at < lo + 86400)
        final_p = float(sim["actual"][inside & flagged].mean())
        final_r = float(flagged[inside & (sim["actual"] == 1)].mean())
        proj = w["projected"]
        assert proj["precision"]["value"] is not None, proj["precision"]
        rows.append(
            (
                final_p,
                w["measures"]["precision"]["value"],
                proj["precision"]["value"],
                proj["precision"]["low"],
                proj["precision"]["high"],
                _error(w["measures"]["recall"]["value"], final_r),
                _error(proj["recall"]["value"], final_r),
            )
        )
        assert w["expected_final_coverage"] == pytest.approx(1.0)
        assert w["settles_by"] is not None
    assert len(rows) >= 8, len(rows)  # kept-first: coverage passes 80% within days
    table = np.array(rows)
    mae_labelled = float(np.mean(np.abs(table[:, 1] - table[:, 0])))
    mae_projected = float(np.mean(np.abs(table[:, 2] - table[:, 0])))
    assert mae_projected <= mae_labelled / 3, (mae_projected, mae_labelled)
    both = ~np.isnan(table[:, 5]) & ~np.isnan(table[:, 6])  # labelled recall needs positives
    assert float(table[both, 6].mean()) <= float(table[both, 5].mean()) + 0.01
    held = np.mean((table[:, 3] <= table[:, 0]) & (table[:, 0] <= table[:, 4]))
    assert held >= 0.7, held
    clock.set(None)
