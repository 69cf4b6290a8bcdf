"""`drift` on /metrics windows: score PSI, Jensen-Shannon distance and the positive rate
change against the model's reference or a `baseline` range, recomputed from raw scores.

The oracles: scipy.stats.entropy (PSI = KL(a || e) + KL(e || a), the symmetric
Kullback-Leibler divergence; Yurdakul 2018, "Statistical properties of population stability
index", eq. 1) and scipy.spatial.distance.jensenshannon with base e (the service states
natural logarithms), on 10 bins at the reference's deciles, each share floored at 1e-4 and
renormalised (DESIGN.md "Drift"). The bins are rebuilt here from the raw scores: bin k holds
scores in [k/100, (k+1)/100).
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from scipy.spatial.distance import jensenshannon
from scipy.stats import entropy
from sqlalchemy import Engine

from belated.clock import clock
from belated.metrics.drift import Against, drift_block
from tests.conftest import Tenant
from tests.support import create_model, send, stamp

DAY0 = datetime(2026, 10, 1, tzinfo=UTC)
NOW = DAY0 + timedelta(days=12, hours=6)
PER_DAY = 400


def _hist(scores: np.ndarray) -> np.ndarray:
    return np.bincount(np.minimum((scores * 100).astype(int), 99), minlength=100)


def _oracle(reference: np.ndarray, current: np.ndarray) -> tuple[float, float]:
    """PSI and JS distance on the reference's deciles, from scipy."""
    total = reference.sum()
    cum = np.cumsum(reference)
    cuts: list[int] = []
    for d in range(1, 10):  # the first edge at or below which d/10 of the reference lies
        edge = int(np.nonzero(cum * 10 >= d * total)[0][0]) + 1
        if edge < 100 and (not cuts or edge > cuts[-1]):
            cuts.append(edge)
    groups = np.split(np.arange(100), cuts)

    def shares(h: np.ndarray) -> np.ndarray:
        merged = np.array([h[g].sum() for g in groups], dtype=float)
        floored = np.maximum(merged / merged.sum(), 1e-4)
        out: np.ndarray = floored / floored.sum()
        return out

    e, a = shares(reference), shares(current)
    return float(entropy(a, e) + entropy(e, a)), float(jensenshannon(e, a, base=np.e))


def _scores(rng: np.random.Generator, n: int, a: float, b: float) -> np.ndarray:
    """Beta(a, b) scores kept off the bin edges (so that binning here and in SQL agree)."""
    return (np.floor(rng.beta(a, b, n) * 10_000) + 0.5) / 10_000


def test_drift_block_matches_scipy_on_seeded_histograms() -> None:
    # 100 seeded pairs: a Beta(2, 5) reference of 2,000 scores; windows of 100 to 1,000
    # scores from Beta(2 + s, 5), s uniform on [0, 1.5)
    rng = np.random.default_rng(42)
    for _ in range(100):
        ref = _hist(_scores(rng, 2000, 2, 5))
        n = int(rng.integers(100, 1000))
        cur = _hist(_scores(rng, n, 2 + rng.uniform(0, 1.5), 5))
        pp = int(rng.integers(0, n))
        block = drift_block(Against(ref, 2000, 500, {"kind": "reference"}), cur, n, pp)
        psi, js = _oracle(ref, cur)
        assert block["score_psi"] == pytest.approx(psi, rel=1e-10)
        assert block["score_js"] == pytest.approx(js, rel=1e-10)
        assert block["positive_rate_change"] == pytest.approx(pp / n - 0.25, abs=1e-15)
        assert "reason" not in block


def test_a_shifted_window_has_a_larger_psi_than_an_unchanged_one() -> None:
    # 400 seeded pairs of windows of 300 scores against a Beta(2, 5) reference of 3,000:
    # one window from Beta(2, 5) (unchanged), one from Beta(2.6, 5) (mean 0.286 -> 0.342).
    # The shifted one must score higher in at least 95% of pairs; the observed share p has
    # a Monte Carlo standard error of sqrt(p(1 - p)/400), about 0.005 at p = 0.99.
    rng = np.random.default_rng(2026)
    wins = 0
    for _ in range(400):
        ref = _hist(_scores(rng, 3000, 2, 5))
        against = Against(ref, 3000, 0, {"kind": "reference"})
        same = drift_block(against, _hist(_scores(rng, 300, 2, 5)), 300, 0)["score_psi"]
        moved = drift_block(against, _hist(_scores(rng, 300, 2.6, 5)), 300, 0)["score_psi"]
        wins += moved > same
    assert wins / 400 >= 0.95


def test_too_few_predictions_or_no_reference_give_nulls_with_reasons() -> None:
    ref = _hist(_scores(np.random.default_rng(1), 2000, 2, 5))
    cur = _hist(_scores(np.random.default_rng(2), 60, 2, 5))
    block = drift_block(Against(ref, 2000, 500, {"kind": "reference"}), cur, 60, 10)
    assert block["score_psi"] is None and block["score_js"] is None
    assert "fewer than 100 predictions in the window" in block["reason"]
    assert block["positive_rate_change"] == pytest.approx(10 / 60 - 0.25)
    empty = drift_block("no settled labelled day yet to take as reference", cur, 60, 10)
    assert all(empty[k] is None for k in ("score_psi", "score_js", "positive_rate_change"))
    assert "reference" in empty["reason"]


@pytest.fixture()
def shop(tenant: Tenant, engine: Engine) -> Iterator[tuple[str, dict[int, np.ndarray]]]:
    """12 days of 400 orders a day with their outcomes (label delay 1 day): days 0-9 scored
    from Beta(2, 5), day 10 the same, day 11 from Beta(4, 3) (a new supplier's sofas)."""
    clock.set(NOW)
    model = create_model(tenant, engine, label_delay_days=1, min_coverage=0.5)
    rng = np.random.default_rng(77)
    by_day: dict[int, np.ndarray] = {}
    preds: list[dict[str, Any]] = []
    labels: list[dict[str, Any]] = []
    for d in range(12):
        scores = _scores(rng, PER_DAY, 4, 3) if d == 11 else _scores(rng, PER_DAY, 2, 5)
        by_day[d] = scores
        for i, s in enumerate(scores):
            pid = f"order-{d}-{i}"
            at = DAY0 + timedelta(days=d, seconds=int(i * 86_400 / PER_DAY))
            preds.append({"id": pid, "ts": stamp(at), "score": float(s)})
            labels.append({"id": pid, "actual": int(rng.random() < s)})
    send(tenant.client, model.name, "predictions", preds)
    send(tenant.client, model.name, "labels", labels)
    yield model.name, by_day
    clock.set(None)


def _windows(tenant: Tenant, model: str, **params: Any) -> list[dict[str, Any]]:
    r = tenant.client.get(f"/v1/models/{model}/metrics", params=params)
    assert r.status_code == 200, r.text
    return list(r.json()["windows"])


def test_windows_carry_drift_against_the_reference_recomputed_from_raw_scores(
    tenant: Tenant, shop: tuple[str, dict[int, np.ndarray]]
) -> None:
    model, by_day = shop
    windows = _windows(tenant, model, start=stamp(DAY0), end=stamp(DAY0 + timedelta(days=12)))
    against = windows[0]["drift"]["against"]
    # the default reference: from the first prediction's day to the last settled day
    # (ended more than the 1-day label delay before now)
    assert against["kind"] == "reference"
    assert against["start"] == stamp(DAY0)
    assert against["end"] == stamp(DAY0 + timedelta(days=11))
    ref_days = range(11)
    ref = _hist(np.concatenate([by_day[d] for d in ref_days]))
    ref_rate = np.mean(np.concatenate([by_day[d] for d in ref_days]) >= 0.5)
    for d, w in enumerate(windows):
        psi, js = _oracle(ref, _hist(by_day[d]))
        assert w["drift"]["score_psi"] == pytest.approx(psi, rel=1e-9)
        assert w["drift"]["score_js"] == pytest.approx(js, rel=1e-9)
        rate = np.mean(by_day[d] >= 0.5)
        assert w["drift"]["positive_rate_change"] == pytest.approx(rate - ref_rate, abs=1e-12)
    assert windows[11]["drift"]["score_psi"] > 0.25 > windows[10]["drift"]["score_psi"]


def test_a_baseline_range_replaces_the_reference(
    tenant: Tenant, shop: tuple[str, dict[int, np.ndarray]]
) -> None:
    model, by_day = shop
    # without an offset: wall time in the model's zone (UTC here)
    baseline = f"{stamp(DAY0 + timedelta(days=2))}/2026-10-05T00:00:00"
    windows = _windows(
        tenant,
        model,
        start=stamp(DAY0 + timedelta(days=9)),
        end=stamp(DAY0 + timedelta(days=12)),
        baseline=baseline,
    )
    base = np.concatenate([by_day[2], by_day[3]])
    for d, w in zip(range(9, 12), windows, strict=True):
        assert w["drift"]["against"] == {
            "kind": "baseline",
            "start": stamp(DAY0 + timedelta(days=2)),
            "end": stamp(DAY0 + timedelta(days=4)),
        }
        psi, js = _oracle(_hist(base), _hist(by_day[d]))
        assert w["drift"]["score_psi"] == pytest.approx(psi, rel=1e-9)
        assert w["drift"]["score_js"] == pytest.approx(js, rel=1e-9)


@pytest.mark.parametrize(
    "baseline",
    ["2026-10-02", "2026-10-04T00:00:00Z/2026-10-02T00:00:00Z", "yesterday/today", "/"],
)
def test_a_malformed_baseline_is_422_naming_it(
    tenant: Tenant, shop: tuple[str, dict[int, np.ndarray]], baseline: str
) -> None:
    model, _ = shop
    r = tenant.client.get(f"/v1/models/{model}/metrics", params={"baseline": baseline})
    assert r.status_code == 422, r.text
    assert r.headers["content-type"].startswith("application/problem+json")
    assert [e["field"] for e in r.json()["errors"]] == ["baseline"]


def test_a_model_without_a_settled_reference_has_null_drift_with_the_reason(
    tenant: Tenant, engine: Engine
) -> None:
    clock.set(NOW)
    try:
        model = create_model(tenant, engine)  # 30-day label delay: nothing settled yet
        rng = np.random.default_rng(3)
        preds = [
            {"id": f"o-{i}", "ts": stamp(NOW - timedelta(hours=30 - i // 20)), "score": float(s)}
            for i, s in enumerate(_scores(rng, 400, 2, 5))
        ]
        send(tenant.client, model.name, "predictions", preds)
        windows = _windows(tenant, model.name)
        busy = [w for w in windows if w["predictions"]]
        assert busy
        for w in busy:
            assert w["drift"]["score_psi"] is None and w["drift"]["against"] is None
            assert "reference" in w["drift"]["reason"]
    finally:
        clock.set(None)
