"""The reverse-time log-rank test of delays between score bands, and the merging of bands.

Reference: lifelines.statistics.multivariate_logrank_test (the K-sample log-rank test,
Mantel 1966) on the same delays. With complete cohorts (every delay seen) the reverse-time
test is the ordinary log-rank test of the reversed delays, M - bin, all observed, so the two
must agree to rounding. Truncated cohorts: seeded simulations (distributions stated in each
test) check the size under the null and the power and the merging under an alternative.
"""

from __future__ import annotations

import numpy as np
import pytest
from lifelines.statistics import multivariate_logrank_test

from belated.stats.delays import N_DELAY_BINS, delay_bins
from belated.stats.homogeneity import band_groups, logrank_reverse


def _one_cohort(bins: np.ndarray) -> np.ndarray:
    return np.bincount(bins, minlength=N_DELAY_BINS)[None, :]


# lifelines calls pandas' sum positionally, which pandas deprecates (not our call)
@pytest.mark.filterwarnings("ignore:Starting with pandas version 4.0")
def test_complete_cohorts_agree_with_lifelines_on_the_reversed_delays() -> None:
    rng = np.random.default_rng(7)
    medians = (30.0, 45.0, 40.0)  # hours; LogNormal(log median, 0.9) delays per group
    groups = [
        delay_bins(m * np.exp(0.9 * rng.standard_normal(n)))
        for m, n in zip(medians, (300, 250, 400), strict=True)
    ]
    hists = np.stack([_one_cohort(g) for g in groups])  # (3 groups, 1 cohort, bins)
    got = logrank_reverse(hists, np.array([1e6]))
    durations = np.concatenate([N_DELAY_BINS - g for g in groups])
    labels = np.concatenate([np.full(g.size, k) for k, g in enumerate(groups)])
    want = multivariate_logrank_test(durations, labels, np.ones(durations.size))
    assert got.df == 2
    assert np.isclose(got.statistic, want.test_statistic, rtol=1e-9)
    assert np.isclose(got.p_value, want.p_value, rtol=1e-7, atol=1e-12)
    assert got.p_value < 0.05  # the medians differ enough to be seen


def _truncated(
    rng: np.random.Generator, medians: list[float], per_cohort: int, n_cohorts: int = 60
) -> tuple[np.ndarray, np.ndarray]:
    """Daily cohorts 1 to n days old; each group's delays LogNormal(log median (hours), 0.8);
    a label is seen when its delay is below the cohort's age."""
    ages = 24.0 * (np.arange(n_cohorts) + 1) + 1.0
    hists = np.zeros((len(medians), n_cohorts, N_DELAY_BINS), np.int64)
    for k, m in enumerate(medians):
        for h, age in enumerate(ages):
            d = m * np.exp(0.8 * rng.standard_normal(per_cohort))
            hists[k, h] = np.bincount(delay_bins(d[d < age - 1.0]), minlength=N_DELAY_BINS)
    return hists, ages


def test_size_under_the_null_and_power_with_truncated_cohorts() -> None:
    rng = np.random.default_rng(11)
    null_p = [logrank_reverse(*_truncated(rng, [72.0, 72.0], 8)).p_value for _ in range(200)]
    size = float(np.mean(np.array(null_p) < 0.05))
    assert 0.015 <= size <= 0.095, size  # nominal 0.05 (binomial sd 0.015 over 200 runs)
    alt_p = [logrank_reverse(*_truncated(rng, [48.0, 96.0], 8)).p_value for _ in range(50)]
    assert float(np.mean(np.array(alt_p) < 0.01)) >= 0.9


def test_bands_merge_where_delays_agree_and_sparse_bands_join_a_neighbour() -> None:
    rng = np.random.default_rng(13)
    # ten bands: 0-4 slow (median 120 h), 5-9 fast (median 30 h); band 9 nearly empty
    medians = [120.0] * 5 + [30.0] * 5
    hists, ages = _truncated(rng, medians, 12)
    hists[9] = 0
    hists[9, -1, 5] = 3  # three labels only
    groups = band_groups(hists, ages, min_labels=200)
    assert groups == [[0, 1, 2, 3, 4], [5, 6, 7, 8, 9]], groups
    # one delay distribution everywhere: one group (the class's own curve serves)
    same, ages = _truncated(rng, [72.0] * 10, 12)
    assert band_groups(same, ages, min_labels=200) == [list(range(10))]
