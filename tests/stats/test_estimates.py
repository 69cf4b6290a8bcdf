"""Label-free estimates (belated/stats/estimates.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from belated.stats.estimates import (
    em_expected_confusion,
    em_prior,
    expected_confusion,
    expected_measures,
    first_positive_bin,
    implied_measures,
)
from belated.stats.summary import summarise
from belated.stats.window import WindowStats


def _unlabelled_window(p: np.ndarray, threshold: float) -> WindowStats:
    return WindowStats.from_rows(p, p >= threshold, [None] * p.size)


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5])
def test_expected_precision_is_within_four_standard_errors_of_the_truth(seed: int) -> None:
    # Seeded simulation: scores p ~ Beta(2, 3) are calibrated by construction (actual ~
    # Bernoulli(p)); with p >= 0.4 flagged there are about 26,000 predicted positives.
    rng = np.random.default_rng(seed)
    p = rng.beta(2.0, 3.0, size=50_000)
    y = rng.random(p.size) < p
    flagged = p >= 0.4
    assert flagged.sum() >= 10_000
    stats = _unlabelled_window(p, 0.4)
    estimated = summarise(stats)["implied"]["precision"]["value"]
    truth = (y & flagged).sum() / flagged.sum()
    # Given the scores, TP is a sum of independent Bernoulli(p): SE = sqrt(sum p(1-p)) / n_pp.
    se = math.sqrt(float((p[flagged] * (1 - p[flagged])).sum())) / flagged.sum()
    assert abs(estimated - truth) < 4 * se
    # The same check for prevalence over all predictions.
    prevalence = summarise(stats)["implied"]["prevalence"]["value"]
    assert abs(prevalence - y.mean()) < 4 * math.sqrt(float((p * (1 - p)).sum())) / p.size


def _shifted_window(
    seed: int, train_prior: float, window_prior: float
) -> tuple[WindowStats, float]:
    """Scores from a model calibrated at `train_prior`, on a window whose prior has moved.

    Classes: x ~ N(+1, 1) for positives, N(-1, 1) for negatives, so the log-likelihood ratio
    is 2x and the calibrated posterior at the training prior is sigmoid(2x + logit(prior))."""
    rng = np.random.default_rng(seed)
    y = rng.random(40_000) < window_prior
    x = rng.normal(np.where(y, 1.0, -1.0), 1.0)
    p = 1.0 / (1.0 + np.exp(-(2.0 * x + math.log(train_prior / (1.0 - train_prior)))))
    return _unlabelled_window(p, 0.5), float(y.mean())


def test_under_a_prior_shift_the_naive_estimate_is_biased_and_em_is_not() -> None:
    # Saerens, Latinne and Decaestecker (2002), Neural Computation 14(1): EM recovers the
    # new prior from the unlabelled window; the plain mean score stays near the old one.
    stats, truth = _shifted_window(seed=8, train_prior=0.3, window_prior=0.1)
    naive = summarise(stats)["implied"]["prevalence"]["value"]
    em = em_prior(stats.hist_all, stats.ssum_all, 0.3)
    assert em is not None
    assert abs(naive - truth) > 0.04
    assert abs(em - truth) < 0.01
    assert summarise(stats, baseline_prior=0.3)["implied"]["prior_em"]["value"] == em


def test_without_a_shift_both_agree_with_the_truth() -> None:
    stats, truth = _shifted_window(seed=9, train_prior=0.3, window_prior=0.3)
    naive = summarise(stats)["implied"]["prevalence"]["value"]
    em = em_prior(stats.hist_all, stats.ssum_all, 0.3)
    assert abs(naive - truth) < 0.01
    assert em is not None and abs(em - truth) < 0.01


def test_binned_em_agrees_with_em_on_raw_scores() -> None:
    # EM of Saerens et al. (2002) written plainly on the raw scores, against the histogram form.
    rng = np.random.default_rng(10)
    p = rng.beta(1.0, 3.0, size=20_000)
    stats = _unlabelled_window(p, 0.5)
    prior = p.mean()
    for _ in range(2000):
        up = prior / 0.4 * p
        down = (1 - prior) / 0.6 * (1 - p)
        prior = float(np.mean(up / (up + down)))
    got = em_prior(stats.hist_all, stats.ssum_all, 0.4)
    assert got == pytest.approx(prior, abs=2e-3)


def test_em_prior_undefined_inputs() -> None:
    zeros = np.zeros(100)
    assert em_prior(zeros, zeros, 0.3) is None
    hist = np.zeros(100)
    hist[20] = 10
    assert em_prior(hist, hist * 0.205, 0.0) is None
    assert em_prior(hist, hist * 0.205, 1.0) is None
    assert em_prior(hist, hist * 0.205, math.nan) is None


def test_expected_confusion_definitions() -> None:
    p = np.array([0.9, 0.6, 0.2, 0.1])
    flagged = np.array([True, True, False, False])
    assert expected_confusion(p, flagged) == pytest.approx((1.5, 0.5, 0.3, 1.7))
    got = expected_measures(1.5, 0.5, 0.3, 1.7)
    assert got["precision"].value == pytest.approx(0.75)
    assert got["recall"].value == pytest.approx(1.5 / 1.8)
    assert got["prevalence"].value == pytest.approx(1.8 / 4)
    assert expected_measures(0.0, 0.0, 0.0, 0.0)["precision"].reason == "no predictions"


def test_em_over_many_windows_equals_em_window_by_window() -> None:
    # The vectorised form runs the same iteration per window (seeded windows from the
    # shifted-prior simulation above, plus the undefined and boundary cases).
    from belated.stats.estimates import em_prior_many

    windows = [
        _shifted_window(seed=20 + k, train_prior=0.3, window_prior=w)[0]
        for k, w in enumerate((0.05, 0.1, 0.3, 0.5, 0.7))
    ]
    hists = [s.hist_all for s in windows]
    sums = [s.ssum_all for s in windows]
    priors = [0.3, 0.3, 0.2, 0.6, 0.3]
    edge = np.zeros(100)
    edge[0] = 5  # every score at 0: the prior is 0 at once
    hists += [np.zeros(100), edge, hists[0]]
    sums += [np.zeros(100), edge * 0.0, sums[0]]
    priors += [0.3, 0.3, math.nan]
    got = em_prior_many(np.array(hists), np.array(sums), np.array(priors))
    for h, s, p, g in zip(hists, sums, priors, got, strict=True):
        alone = em_prior(h, s, p)
        if alone is None:
            assert g is None
        else:
            assert g == pytest.approx(alone, abs=1e-9)
    assert got[5] is None and got[6] == 0.0 and got[7] is None


def _reference_pool(seed: int, n: int = 200_000) -> tuple[np.ndarray, np.ndarray]:
    """Scores calibrated at the reference prior 0.1: classes ~ Bernoulli(0.1), x ~ N(+-1, 1),
    p = sigmoid(2x + logit 0.1), which is P(y = 1 | x) at that prior."""
    rng = np.random.default_rng(seed)
    y = rng.random(n) < 0.1
    x = rng.normal(np.where(y, 1.0, -1.0), 1.0)
    return 1.0 / (1.0 + np.exp(-(2.0 * x + math.log(0.1 / 0.9)))), y


def _shifted(
    rng: np.random.Generator, pool: tuple[np.ndarray, np.ndarray], prior: float, n: int
) -> tuple[np.ndarray, np.ndarray]:
    """Pure label shift: classes drawn at the new prior, each score resampled from its
    class's scores in the reference pool (p(x | y) unchanged)."""
    p, y = pool
    n_pos = rng.binomial(n, prior)
    pos = rng.choice(p[y], n_pos)
    neg = rng.choice(p[~y], n - n_pos)
    return np.r_[pos, neg], np.r_[np.ones(n_pos, bool), np.zeros(n - n_pos, bool)]


@pytest.mark.parametrize("prior", [0.05, 0.2, 0.4])
def test_em_prior_is_unbiased_under_pure_label_shift(prior: float) -> None:
    # Saerens, Latinne and Decaestecker (2002), "Adjusting the outputs of a classifier to new
    # a priori probabilities: a simple procedure", Neural Computation 14(1):21-41, sec. 2-3:
    # under a pure prior shift EM on the unlabelled outputs converges to the new prior.
    # 200 replications of 5,000 predictions each, from the histogram (counts and score sums
    # per bin) only; bias below 0.01, and within 4 MCSE of 0 plus the binning's 0.003.
    pool = _reference_pool(1)
    rng = np.random.default_rng(int(prior * 1000))
    errors, naive, implied_err, plain_err = [], [], [], []
    for _ in range(200):
        p, y = _shifted(rng, pool, prior, 5000)
        stats = _unlabelled_window(p, 0.5)
        est = em_prior(stats.hist_all, stats.ssum_all, 0.1)
        assert est is not None
        errors.append(est - prior)
        naive.append(p.mean() - prior)
        flagged = p >= 0.5
        truth = (y & flagged).sum() / flagged.sum()
        got = implied_measures(stats.hist_all, stats.ssum_all, 0.5, 0.1)["precision"].value
        assert got is not None
        implied_err.append(got - truth)
        plain_err.append(float(p[flagged].mean()) - truth)
    bias = float(np.mean(errors))
    mcse = float(np.std(errors, ddof=1)) / math.sqrt(len(errors))
    assert abs(bias) < 0.01 and abs(bias) < 4 * mcse + 0.003, (bias, mcse)
    # the shift is real: the mean score (no adjustment) misses the prior by far more
    assert abs(float(np.mean(naive))) > 0.02
    # and the implied precision from the adjusted posteriors follows the new prior
    assert abs(float(np.mean(implied_err))) < 0.02
    assert abs(float(np.mean(implied_err))) < abs(float(np.mean(plain_err))) / 2


def test_em_expected_confusion_without_a_shift_is_the_plain_expected_confusion() -> None:
    # At the training prior the adjustment is the identity (Saerens et al. 2002, eq. 2.4 with
    # equal priors), so the histogram form equals the raw-score expected confusion of the
    # bins' predictions, up to the bin-mean approximation.
    rng = np.random.default_rng(5)
    p = rng.beta(2.0, 5.0, 20_000)
    stats = _unlabelled_window(p, 0.5)
    prior = em_prior(stats.hist_all, stats.ssum_all, float(p.mean()))
    assert prior == pytest.approx(p.mean(), abs=1e-3)
    got = em_expected_confusion(stats.hist_all, stats.ssum_all, 0.5, float(p.mean()))
    assert got is not None
    assert got == pytest.approx(expected_confusion(p, p >= 0.5), rel=5e-3)


def test_first_positive_bin_and_undefined_implied_measures() -> None:
    assert first_positive_bin(0.5) == 50 and first_positive_bin(0.0) == 0
    assert first_positive_bin(0.505) == 51 and first_positive_bin(1.0) == 100
    assert first_positive_bin(0.29) == 29  # 0.29 * 100 is 28.999999999999996
    zeros = np.zeros(100)
    assert implied_measures(zeros, zeros, 0.5, 0.1)["precision"].reason == "no predictions"
    hist = np.zeros(100)
    hist[60] = 3
    out = implied_measures(hist, hist * 0.605, 0.5, 1.0)
    assert out["recall"].value is None and out["recall"].reason is not None
