"""Per-segment arrival curves, and one fit of the curves per request, on both stores.

Seeded simulation (invented data, stated here): 100 days of 200 predictions a day, 97% in
region north and 3% in south; scores Beta(0.6, 2.4), outcomes Bernoulli(score); a positive's
label arrives after LogNormal(median 2 days, sigma 0.6) in north and LogNormal(median 9 days,
sigma 0.6) in south, a negative's after LogNormal(median 10 days, sigma 0.8); negatives not
labelled by 30 days are implied. North has thousands of labels of each class, south about
100 positives: fewer than the 200 a curve needs (DESIGN.md "Late labels").

Checked: a window filtered on north is projected with north's own curves, one on south with
the model's (the window's `projected_curves` says which); north's own positive curve is
faster than the model's, as the simulation makes it; and a request fits each set of curves
once however many parts of the answer use them (a dashboard page uses them for the windows,
the delays panel and the threshold advice).
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from sqlalchemy import Engine

from belated.clock import clock
from belated.metrics import arrival
from tests.conftest import Tenant
from tests.support import create_model, send, stamp

SEED = 20261205
NOW = datetime(2026, 11, 30, 12, 0, tzinfo=UTC)
DAYS, PER_DAY = 100, 200


def _simulate() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(SEED)
    n = DAYS * PER_DAY
    day = np.repeat(np.arange(DAYS), PER_DAY)
    first = (NOW - timedelta(days=DAYS)).replace(hour=0, minute=0)
    ts = first.timestamp() + day * 86400 + rng.uniform(0, 86_000, n)
    score = rng.beta(0.6, 2.4, n)
    actual = (rng.random(n) < score).astype(int)
    north = rng.random(n) < 0.97
    median = np.where(actual == 1, np.where(north, 2.0, 9.0), 10.0)
    sigma = np.where(actual == 1, 0.6, 0.8)
    delay_days = median * np.exp(sigma * rng.standard_normal(n))
    return {
        "ts": ts,
        "score": score,
        "actual": actual,
        "north": north,
        "label_at": ts + delay_days * 86400,
    }


def _ingest(tenant: Tenant, engine: Engine) -> str:
    sim = _simulate()
    model = create_model(tenant, engine, label_delay_days=30, negative_after_days=30)
    preds = [
        {
            "id": f"p{i}",
            "ts": stamp(datetime.fromtimestamp(float(sim["ts"][i]), UTC)),
            "score": float(sim["score"][i]),
            "tags": {"region": "north" if sim["north"][i] else "south"},
        }
        for i in range(len(sim["ts"]))
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
    return model.name


def _counting(monkeypatch: pytest.MonkeyPatch) -> list[Any]:
    """Record every fit of curves (the segment each was fitted on): a spy, not a stand-in."""
    calls: list[Any] = []
    real: Callable[..., Any] = arrival._fit_on

    def spy(session: Any, model: Any, now: datetime, segment: Any) -> Any:
        calls.append(segment)
        return real(session, model, now, segment)

    monkeypatch.setattr(arrival, "_fit_on", spy)
    return calls


@pytest.mark.slow
def test_a_segment_with_the_labels_gets_its_own_curves_and_a_request_fits_once(
    tenant: Tenant, engine: Engine, monkeypatch: pytest.MonkeyPatch
) -> None:
    clock.set(NOW)
    name = _ingest(tenant, engine)
    calls = _counting(monkeypatch)
    params = {
        "granularity": "day",
        "start": stamp(NOW.replace(hour=0) - timedelta(days=20)),
        "end": stamp(NOW.replace(hour=0)),
    }
    sources = {}
    for region in ("north", "south"):
        calls.clear()
        r = tenant.client.get(f"/v1/models/{name}/metrics", params={**params, "tag.region": region})
        assert r.status_code == 200, r.text
        unsettled = [w for w in r.json()["windows"] if w["projected"] is not None]
        assert unsettled, region
        sources[region] = {w["projected_curves"]["source"] for w in unsettled}
        # north: its own fit only; south: its own (too few labels), then the model's
        want = [("region", region)] if region == "north" else [("region", region), None]
        assert calls == want, (region, calls)
    assert sources == {"north": {"segment"}, "south": {"model"}}

    # the dashboard page uses the model's curves three times and fits them once
    calls.clear()
    page = tenant.client.get(f"/models/{name}", headers=tenant.headers("read"))
    assert page.status_code == 200
    assert calls.count(None) == 1, calls
    # and a new request fits them again (the memo lives on the request's session)
    calls.clear()
    assert tenant.client.get(f"/v1/models/{name}/delays").status_code == 200
    assert calls == [None]
    clock.set(None)


@pytest.mark.slow
def test_the_segments_own_positive_curve_is_the_faster_one(tenant: Tenant, engine: Engine) -> None:
    """North's positives come back in 2 days (median), the model's are a mix with south's
    9 days: at 2 days north's curve must stand above the model's."""
    from sqlalchemy import select
    from sqlalchemy.orm import Session

    from belated.store.tables import ModelRow

    clock.set(NOW)
    name = _ingest(tenant, engine)
    assert tenant.client.get(f"/v1/models/{name}/delays").status_code == 200  # refreshes
    with Session(engine) as session:
        row = session.scalars(
            select(ModelRow).where(ModelRow.name == name, ModelRow.project_id == tenant.project_id)
        ).one()
        north = arrival.model_curves(session, row, NOW, ("region", "north"))
        whole = arrival.model_curves(session, row, NOW)
    assert north.source == "segment" and whole.source == "model"
    assert north.positive.curve is not None and whole.positive.curve is not None
    at_2_days = float(north.positive.curve.at(48.0)), float(whole.positive.curve.at(48.0))
    assert at_2_days[0] > at_2_days[1], at_2_days
    assert abs(at_2_days[0] - 0.5) < 0.06, at_2_days  # the median of north's delays is 2 days
    clock.set(None)
