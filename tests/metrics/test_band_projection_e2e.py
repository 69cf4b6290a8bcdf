"""Projected recall when label delays depend on the score as well as the class, through the
service on both stores (issue 12's second scenario).

Seeded simulation (invented data, stated here): 120 days of 240 predictions a day; scores
Beta(0.6, 2.4), outcomes Bernoulli(score) (calibrated, prevalence near 0.2); predicted
positive at a score of at least 0.5 (the default threshold). A positive's label arrives
after LogNormal(median 8 exp(-4 score) days, sigma 0.6) (a confident flag is investigated
sooner: 6.5 days at score 0.05, 0.2 days at 0.9), a negative's after LogNormal(median
12 exp(-2 score) days, sigma 1.0); `negative_after_days` 30 implies the rest. Labels stamped
after NOW are not sent. The unsettled daily windows with 15% to 80% coverage are scored
against their final recall (every prediction's true class).

Labelled positives are then not a fair sample of all positives: the flagged (high-score) ones
come back first, so labelled-only recall runs high. One arrival curve per class mixes fast
and slow positives and corrects only a little; curves per score band (merged where their
delays do not differ) correct it. Checked: labelled-only recall is biased upwards (its mean
error above +0.03), the projection the service answers (band curves) has a recall MAE at most
half of the labelled-only one and below the class-curve projection's (computed in process
from the same rollups with the band curves left out), and its 95% intervals hold the final
recall in at least 90% of the windows.
"""

from __future__ import annotations

import dataclasses
from datetime import UTC, datetime, timedelta

import numpy as np
import pytest
from sqlalchemy import Engine, select
from sqlalchemy.orm import Session

from belated.clock import clock
from belated.metrics.arrival import model_curves, projected
from belated.metrics.params import Range
from belated.metrics.windows import window_rows
from belated.store.tables import ModelRow
from tests.conftest import Tenant
from tests.support import create_model, send, stamp

SEED = 20261204
NOW = datetime(2026, 11, 30, 12, 0, tzinfo=UTC)
DAYS, PER_DAY = 120, 240


def _simulate() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(SEED)
    n = DAYS * PER_DAY
    day = np.repeat(np.arange(DAYS), PER_DAY)
    first = (NOW - timedelta(days=DAYS)).replace(hour=0, minute=0)
    ts = first.timestamp() + day * 86400 + rng.uniform(0, 86_000, n)
    score = rng.beta(0.6, 2.4, n)
    actual = (rng.random(n) < score).astype(int)
    median_days = np.where(actual == 1, 8.0 * np.exp(-4.0 * score), 12.0 * np.exp(-2.0 * score))
    sigma = np.where(actual == 1, 0.6, 1.0)
    delay_days = median_days * np.exp(sigma * rng.standard_normal(n))
    return {"ts": ts, "score": score, "actual": actual, "label_at": ts + delay_days * 86400}


@pytest.mark.slow
def test_band_curves_correct_the_recall_that_score_dependent_delays_bias(
    tenant: Tenant, engine: Engine
) -> None:
    sim = _simulate()
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
    start = NOW.replace(hour=0) - timedelta(days=40)
    end = NOW.replace(hour=0) + timedelta(days=1)
    r = tenant.client.get(
        f"/v1/models/{model.name}/metrics",
        params={"granularity": "day", "start": stamp(start), "end": stamp(end)},
    )
    assert r.status_code == 200, r.text
    windows = r.json()["windows"]
    delays = tenant.client.get(f"/v1/models/{model.name}/delays")
    assert delays.status_code == 200, delays.text
    by_band = delays.json()["arrival_by_band"]
    assert by_band["1"] is not None and len(by_band["1"]) >= 2, by_band  # positives' bands differ
    for groups in (g for g in by_band.values() if g is not None):
        edges = [(g["score_from"], g["score_to"]) for g in groups]
        assert edges[0][0] == 0.0 and edges[-1][1] == 1.0, edges  # contiguous, all scores
        assert all(a[1] == b[0] for a, b in zip(edges, edges[1:], strict=False)), edges
        assert all(g["labels"] >= 200 and g["arrival"] for g in groups), groups
    # the faster positives are the high-score ones: the top group's curve is ahead at 1 day
    first, last = by_band["1"][0]["arrival"], by_band["1"][-1]["arrival"]
    at_day = [
        np.interp(24.0, [p["age_hours"] for p in c], [p["arrived"] for p in c])
        for c in (first, last)
    ]
    assert at_day[1] > at_day[0] + 0.2, at_day

    # the class-curve projection of the same windows, in process, from the same rollups
    class_recall: dict[str, float | None] = {}
    with Session(engine) as session:
        row = session.scalars(select(ModelRow).where(ModelRow.id == model.id)).one()
        curves = model_curves(session, row, NOW)
        assert curves.bands is not None
        by_class = dataclasses.replace(curves, bands=None)
        rng = Range("day", start, end)
        starts, rows = window_rows(session, row, rng, 0, (), NOW)
        for s, cohorts in zip(starts, rows, strict=True):
            if cohorts:
                answer = projected(cohorts, by_class, row, NOW, beta=1.0, confidence=0.95)
                class_recall[s.isoformat()] = answer["projected"]["recall"]["value"]

    flagged = sim["score"] >= 0.5
    table: list[tuple[float, float, float, float, float, float]] = []
    for w in windows:
        if w["settled"] or not w["coverage"] or not 0.15 <= w["coverage"] <= 0.80:
            continue
        lo = datetime.fromisoformat(w["start"].replace("Z", "+00:00"))
        inside = (at >= lo.timestamp()) & (at < lo.timestamp() + 86400)
        final = float(flagged[inside & (sim["actual"] == 1)].mean())
        proj = w["projected"]["recall"]
        labelled = w["measures"]["recall"]["value"]
        by_class_value = class_recall[lo.astimezone(UTC).isoformat()]
        assert None not in (proj["value"], labelled, by_class_value), (w["start"], proj)
        assert w["projected_curves"] == {"source": "model", "by": "band"}
        table.append((final, labelled, by_class_value, proj["value"], proj["low"], proj["high"]))
    assert len(table) >= 15, len(table)
    t = np.array(table)
    bias_labelled = float(np.mean(t[:, 1] - t[:, 0]))
    mae_labelled, mae_class, mae_band = (
        float(np.mean(np.abs(t[:, k] - t[:, 0]))) for k in (1, 2, 3)
    )
    held = float(np.mean((t[:, 4] <= t[:, 0]) & (t[:, 0] <= t[:, 5])))
    print(
        f"windows {len(t)}: labelled-only recall bias {bias_labelled:+.3f}, MAE labelled-only"
        f" {mae_labelled:.3f}, class curves {mae_class:.3f}, band curves {mae_band:.3f};"
        f" 95% intervals held {held:.2f}"
    )
    assert bias_labelled > 0.03, bias_labelled
    assert mae_band <= mae_labelled / 2, (mae_band, mae_labelled)
    assert mae_band < mae_class, (mae_band, mae_class)
    assert held >= 0.9, held
    clock.set(None)
