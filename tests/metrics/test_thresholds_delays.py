"""GET /thresholds against scikit-learn per bin edge; GET /delays against Kaplan-Meier.

Thresholds: at t = k/100 a labelled prediction counts as positive when its score is at least
t, i.e. when its histogram bin min(floor(100 p), 99) is k or more (the same up to float
rounding at the edges); precision, recall and F-beta of each cut come from scikit-learn.

Delays: the product-limit estimator (Kaplan and Meier 1958) with unlabelled predictions
censored at their age. The service interpolates within the 462 delay bins (hourly to 48 h,
6-hourly to 168 h, daily to 400 days, one open bin); its p50/p90/p99 must lie within half a
bin of lifelines' KaplanMeierFitter on the exact delays (DESIGN.md, "Label delays"). The
binned product-limit formula, checked against statsmodels' SurvfuncRight, says whether a
quantile is reached at all.
"""

from __future__ import annotations

import dataclasses
import math
from datetime import timedelta
from typing import Any

import numpy as np
import pytest
from lifelines import KaplanMeierFitter
from sklearn.metrics import precision_recall_fscore_support
from sqlalchemy import Engine
from statsmodels.duration.survfunc import SurvfuncRight

from belated.clock import clock
from tests.conftest import Tenant
from tests.support import create_model, send, stamp
from tests.support.datasets import (
    NOW,
    START,
    breast_cancer,
    epoch,
    in_range,
    ingest,
)

EDGES = np.array([*range(0, 49), *range(54, 169, 6), *range(192, 9601, 24), math.inf], float)


def _get(tenant: Tenant, model: str, what: str, **params: Any) -> dict[str, Any]:
    r = tenant.client.get(f"/v1/models/{model}/{what}", params=params)
    assert r.status_code == 200, r.text
    return r.json()


def _close(a: float | None, b: float) -> bool:
    return (a is None and math.isnan(b)) or (a is not None and abs(a - b) <= 1e-12)


def test_sweep_rows_and_recommendations_equal_sklearn(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    sc = breast_cancer()
    model = create_model(tenant, engine)
    ingest(tenant.client, model.name, sc, NOW)
    for beta in (1.0, 2.0):
        check_sweep(tenant, model.name, sc, beta)


def check_sweep(tenant: Tenant, model: str, sc: Any, beta: float) -> None:
    """One sweep against scikit-learn at every bin edge."""
    start, end = START + timedelta(days=2), START + timedelta(days=20, hours=5)
    answer = _get(
        tenant,
        model,
        "thresholds",
        start=stamp(start),
        end=stamp(end),
        beta=beta,
        precision_target=0.7,
        recall_target=0.8,
    )
    lab = in_range(sc.ts, start, end) & sc.known(NOW)
    y, p = sc.actual[lab], sc.score[lab]
    bins = np.minimum((p * 100).astype(int), 99)
    assert answer["labelled"] == len(y)
    rows = answer["sweep"]
    assert [r["threshold"] for r in rows] == [k / 100 for k in range(100)]
    table = []
    for k, row in enumerate(rows):
        called = (bins >= k).astype(int)
        prec, rec, f, _ = precision_recall_fscore_support(
            y, called, labels=[1], beta=beta, zero_division=np.nan
        )
        assert _close(row["precision"], prec[0]), (k, row, prec)
        assert _close(row["recall"], rec[0]), (k, row, rec)
        assert _close(row["fbeta"], f[0]), (k, row, f)
        assert _close(row["positive_rate"], called.mean())
        assert row["tp"] + row["fn"] == int(y.sum())
        assert row["tp"] + row["fp"] == int(called.sum())
        table.append((k, prec[0], rec[0], f[0]))
    finite = [t for t in table if not math.isnan(t[3])]
    best = max(finite, key=lambda t: (t[3], -t[0]))  # ties: the lowest threshold
    assert answer["best_fbeta"]["threshold"] == best[0] / 100
    assert _close(answer["best_fbeta"]["fbeta"], best[3])
    lowest = min(t[0] for t in table if t[1] >= 0.7)  # NaN compares False
    highest = max(t[0] for t in table if t[2] >= 0.8)
    assert answer["for_precision"]["threshold"] == lowest / 100
    assert answer["for_recall"]["threshold"] == highest / 100
    assert 0 < lowest < 99 and 0 < highest < 99  # the targets bite inside the range


def _bin(hours: np.ndarray) -> np.ndarray:
    return np.minimum(
        np.searchsorted(EDGES, np.maximum(hours, 0.0), side="right") - 1, len(EDGES) - 2
    )


def km_reference(delays_h: np.ndarray, ages_h: np.ndarray) -> dict[str, float | None]:
    """Quantiles by the product-limit formula on binned times, checked with statsmodels."""
    events = np.bincount(_bin(delays_h), minlength=len(EDGES) - 1).astype(float)
    censored = np.bincount(_bin(ages_h), minlength=len(EDGES) - 1).astype(float)
    at_risk = np.cumsum((events + censored)[::-1])[::-1]
    hazard = np.divide(events, at_risk, out=np.zeros_like(events), where=at_risk > 0)
    share = 1 - np.cumprod(1 - hazard)
    # statsmodels on the same data: times are the bins' upper edges (the open bin: far away)
    upper = np.where(np.isinf(EDGES[1:]), 1e9, EDGES[1:])
    fit = SurvfuncRight(
        np.concatenate([upper[_bin(delays_h)], upper[_bin(ages_h)]]),
        np.concatenate([np.ones(len(delays_h)), np.zeros(len(ages_h))]),
    )
    out: dict[str, float | None] = {}
    for name, q in (("p50", 0.5), ("p90", 0.9), ("p99", 0.99)):
        hit = np.flatnonzero(share >= q - 1e-12)
        mine = float(EDGES[hit[0] + 1]) if hit.size else math.inf
        reached = np.flatnonzero(1 - fit.surv_prob >= q - 1e-12)
        theirs = float(fit.surv_times[reached[0]]) if reached.size else math.inf
        assert mine == theirs or (mine == math.inf and theirs == 1e9), (name, mine, theirs)
        out[name] = mine if math.isfinite(mine) else None
    return out


def lifelines_quantiles(delays_h: np.ndarray, ages_h: np.ndarray) -> dict[str, float | None]:
    """p50/p90/p99 of the arrival share by lifelines' Kaplan-Meier on exact times: the first
    time where 1 - S(t) reaches q (None when it never does)."""
    fit = KaplanMeierFitter().fit(
        np.concatenate([delays_h, ages_h]),
        np.concatenate([np.ones(len(delays_h)), np.zeros(len(ages_h))]),
    )
    times = fit.survival_function_.index.to_numpy(dtype=float)
    share = 1 - fit.survival_function_.iloc[:, 0].to_numpy(dtype=float)
    out: dict[str, float | None] = {}
    for name, q in (("p50", 0.5), ("p90", 0.9), ("p99", 0.99)):
        hit = np.flatnonzero(share >= q - 1e-12)
        out[name] = float(times[hit[0]]) if hit.size else None
    return out


def half_bin(hours: float) -> float:
    """Half the width of the delay bin that holds `hours`."""
    i = int(np.clip(np.searchsorted(EDGES, hours, side="right") - 1, 0, len(EDGES) - 2))
    width = EDGES[i + 1] - EDGES[i]
    return 0.5 * (width if math.isfinite(width) else 24.0)


def _ingest_until(tenant: Tenant, model: str, sc: Any, when: Any) -> np.ndarray:
    """At `when`, the predictions made so far and the labels known; the rows sent."""
    clock.set(when)
    sent = sc.ts <= epoch(when)
    send(tenant.client, model, "predictions", sc.prediction_items(np.flatnonzero(sent)))
    send(tenant.client, model, "labels", sc.label_items(sc.known(when)))
    return sent


def test_delay_quantiles_equal_kaplan_meier_with_censoring(
    tenant: Tenant, engine: Engine, frozen: None
) -> None:
    assert len(EDGES) - 1 == 462
    base = breast_cancer(never=0.02)  # few outcomes never come, so p90 is reached
    # predictions at half past the hour: the rollups know only the hour, and censor an
    # unlabelled prediction at the middle of it, so here that is its exact age
    ts = np.floor(base.ts / 3600) * 3600 + 1800
    sc = dataclasses.replace(base, ts=ts, label_at=ts + (base.label_at - base.ts))
    model = create_model(tenant, engine)
    when = START + timedelta(days=21, hours=7, minutes=45)  # recent ages in hourly bins
    sent = _ingest_until(tenant, model.name, sc, when)
    for start in (START, START + timedelta(days=17)):  # the later range: fresh windows only
        rows = sent & in_range(sc.ts, start, when)
        known = rows & sc.known(when)
        # the range ends with the current hour, whose predictions are minutes old
        end = when.replace(minute=0) + timedelta(hours=1)
        answer = _get(tenant, model.name, "delays", start=stamp(start), end=stamp(end))
        assert answer["unit"] == "hours"
        delays = (sc.label_at[known] - sc.ts[known]) / 3600
        ages = (epoch(when) - sc.ts[rows & ~known]) / 3600
        binned = km_reference(delays, ages)  # the product-limit formula on the bins
        exact = lifelines_quantiles(delays, ages)  # lifelines on the exact delays
        assert exact["p50"] is not None
        assert start != START or exact["p90"] is not None  # the data reach p90 here
        for name, value in answer["quantiles"].items():
            # interpolated within the bin: within half a bin of lifelines on exact delays
            reference = exact[name]
            assert (value is None) == (reference is None) == (binned[name] is None), name
            if value is not None and reference is not None:
                assert abs(value - reference) <= half_bin(reference) + 1e-9, (name, value, exact)
        age_days = np.floor((epoch(when) - sc.ts[rows]) / 86400).astype(int)
        labelled = sc.known(when)[rows]
        by_age = {
            int(d): (int((age_days == d).sum()), int(labelled[age_days == d].sum()))
            for d in set(age_days)
        }
        got = {r["age_days"]: r for r in answer["coverage_by_age"]}
        assert sorted(got) == sorted(by_age)
        for d, (n, k) in by_age.items():
            assert got[d]["coverage"] == pytest.approx(k / n, abs=1e-6)


@pytest.mark.parametrize("start_day", [0, 17])
def test_delay_quantiles_bracketed_by_the_hour_of_each_prediction(
    tenant: Tenant, engine: Engine, frozen: None, start_day: int
) -> None:
    """With times anywhere in the hour the censoring age is known to the hour only.

    Censoring later can only raise Kaplan-Meier quantiles (it keeps more at risk), so the
    answer must lie between lifelines' estimates with every prediction censored at its
    hour's end and at its start, give or take half a bin (the interpolation within a bin).
    """
    sc = breast_cancer(never=0.02)
    model = create_model(tenant, engine)
    when = START + timedelta(days=21, hours=7, minutes=20)
    sent = _ingest_until(tenant, model.name, sc, when)
    start = START + timedelta(days=start_day)
    rows = sent & in_range(sc.ts, start, when)
    known = rows & sc.known(when)
    delays = (sc.label_at[known] - sc.ts[known]) / 3600
    hour = np.floor(sc.ts[rows & ~known] / 3600)
    young = lifelines_quantiles(delays, epoch(when) / 3600 - (hour + 1))
    old = lifelines_quantiles(delays, epoch(when) / 3600 - hour)
    exact = lifelines_quantiles(delays, (epoch(when) - sc.ts[rows & ~known]) / 3600)
    end = when.replace(minute=0) + timedelta(hours=1)
    got = _get(tenant, model.name, "delays", start=stamp(start), end=stamp(end))["quantiles"]
    assert young["p50"] is not None

    def hours(v: float | None) -> float:
        return math.inf if v is None else v  # None: not reached within 400 days

    for name in ("p50", "p90", "p99"):
        low, high = hours(young[name]), hours(old[name])
        assert low <= hours(exact[name]) <= high
        slack_low = half_bin(low) if math.isfinite(low) else 0.0
        slack_high = half_bin(high) if math.isfinite(high) else 0.0
        assert low - slack_low - 1e-9 <= hours(got[name]) <= high + slack_high, (name, got)
