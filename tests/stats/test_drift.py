"""Score and tag distribution drift (belated/stats/drift.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial.distance import jensenshannon
from scipy.stats import entropy

from belated.stats.drift import (
    SHARE_FLOOR,
    categorical_psi,
    decile_cuts,
    js_distance,
    merge_at,
    psi,
    psi_band,
)
from belated.stats.ranking import score_bins


def _hist(scores: np.ndarray) -> np.ndarray:
    return np.bincount(score_bins(scores), minlength=100)


def _floored(counts: np.ndarray) -> np.ndarray:
    shares = np.maximum(counts / counts.sum(), SHARE_FLOOR)
    return shares / shares.sum()


def _pair(seed: int, n: int = 1000, shift: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    baseline = rng.beta(2.0, 5.0, n)
    current = np.clip(rng.beta(2.0, 5.0, n) + shift, 0.0, 1.0)
    return _hist(baseline), _hist(current)


def test_decile_cuts_split_a_smooth_baseline_into_tenths() -> None:
    baseline, _ = _pair(1, n=100_000)
    cuts = decile_cuts(baseline)
    assert len(cuts) == 9
    shares = merge_at(baseline, cuts) / baseline.sum()
    # Each part holds a tenth, give or take one fine bin's share.
    assert np.all(np.abs(shares - 0.1) <= baseline.max() / baseline.sum())
    # Each cut is the first edge at or below which the decile's share lies.
    cumulative = np.cumsum(baseline) / baseline.sum()
    for d, cut in enumerate(cuts, start=1):
        assert cumulative[cut - 1] >= d / 10 > cumulative[cut - 2]


def test_lumpy_baseline_gives_fewer_bins() -> None:
    baseline = np.zeros(100, dtype=np.int64)
    baseline[[10, 90]] = [700, 300]
    # Deciles 1-7 fall in bin 10, deciles 8-9 in bin 90: three parts.
    assert decile_cuts(baseline) == [11, 91]


@pytest.mark.parametrize("shift", [0.0, 0.03, 0.15])
def test_psi_is_the_symmetric_kl_divergence(shift: float) -> None:
    # scipy.stats.entropy as the oracle: PSI = KL(a || e) + KL(e || a) on the same bins.
    baseline, current = _pair(2, shift=shift)
    cuts = decile_cuts(baseline)
    e, a = _floored(merge_at(baseline, cuts)), _floored(merge_at(current, cuts))
    assert psi(baseline, current).value == pytest.approx(entropy(a, e) + entropy(e, a), rel=1e-10)


@pytest.mark.parametrize("shift", [0.0, 0.03, 0.15])
def test_js_distance_matches_scipy(shift: float) -> None:
    # scipy.spatial.distance.jensenshannon (natural log; a distance, not a divergence).
    baseline, current = _pair(3, shift=shift)
    cuts = decile_cuts(baseline)
    e, a = _floored(merge_at(baseline, cuts)), _floored(merge_at(current, cuts))
    assert js_distance(baseline, current).value == pytest.approx(jensenshannon(e, a), rel=1e-10)


def test_no_shift_keeps_psi_under_one_tenth_in_95_percent_of_draws() -> None:
    # Seeded draws, 1,000 predictions a window on both sides, the same distribution.
    values = [psi(*_pair(seed)).value for seed in range(200)]
    share_under = np.mean(np.array(values) < 0.1)
    assert share_under >= 0.95


def test_trade_reading_of_psi() -> None:
    # Common practice: PSI under 0.1 is read as no real shift, over 0.25 as a major one.
    small = psi(*_pair(4, n=5000, shift=0.01)).value
    large = psi(*_pair(4, n=5000, shift=0.2)).value
    assert small is not None and large is not None
    assert psi_band(small) == "stable"
    assert psi_band(large) == "major"
    assert psi_band(0.1) == "moderate"
    assert psi_band(0.25) == "moderate"


def test_empty_bins_stay_finite_thanks_to_the_floor() -> None:
    baseline, _ = _pair(5)
    current = np.zeros(100, dtype=np.int64)
    current[99] = 500
    value = psi(baseline, current).value
    assert value is not None and np.isfinite(value) and value > 1.0
    distance = js_distance(baseline, current).value
    assert distance is not None and np.isfinite(distance)


def test_undefined_under_one_hundred_predictions() -> None:
    baseline, current = _pair(6, n=99)
    assert psi(baseline, _pair(6)[1]).reason == "fewer than 100 predictions in the baseline"
    assert psi(_pair(6)[0], current).reason == "fewer than 100 predictions in the window"
    assert js_distance(baseline, current).value is None


def test_categorical_psi() -> None:
    baseline = {"north": 500, "south": 300, "east": 200}
    current = {"north": 300, "south": 300, "east": 150, "west": 250}
    keys = ["east", "north", "south", "west"]
    e = _floored(np.array([baseline.get(k, 0) for k in keys], dtype=float))
    a = _floored(np.array([current.get(k, 0) for k in keys], dtype=float))
    # scipy.stats.entropy as the oracle, as for scores.
    expected = entropy(a, e) + entropy(e, a)
    assert categorical_psi(baseline, current).value == pytest.approx(expected, rel=1e-10)
    assert categorical_psi(baseline, baseline).value == pytest.approx(0.0, abs=1e-15)
    assert categorical_psi(baseline, {"north": 5}).value is None
