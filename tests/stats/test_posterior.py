"""Posterior intervals of fbeta, mcc and balanced accuracy (belated/stats/posterior.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import beta as beta_law

from belated.stats import posterior
from belated.stats.bootstrap import binary_arrays, bootstrap_binary
from belated.stats.posterior import DEFAULT_DRAWS, posterior_binary, posterior_binary_many
from belated.stats.summary import summarise

from .builders import breast_cancer_scores, window_from


def test_same_counts_and_seed_give_the_same_interval_and_the_memo_is_transparent() -> None:
    first = posterior_binary(12, 5, 9, 120, beta=1.0, confidence=0.95, seed=3)
    assert posterior_binary(12, 5, 9, 120, beta=1.0, confidence=0.95, seed=3) == first
    posterior._MEMO.clear()
    assert posterior_binary(12, 5, 9, 120, beta=1.0, confidence=0.95, seed=3) == first
    assert posterior_binary(12, 5, 9, 120, beta=1.0, confidence=0.95, seed=4) != first
    # A window's interval does not depend on the windows computed beside it.
    many = posterior_binary_many([(1, 2, 3, 4), (12, 5, 9, 120)], beta=1.0, confidence=0.95,
                                 seed=3)  # fmt: skip
    assert many[1] == first
    assert posterior_binary(1, 2, 3, 4, beta=1.0, confidence=0.9, draws=0) == dict.fromkeys(
        ("fbeta", "mcc", "balanced_accuracy")
    )
    empty = posterior_binary(0, 0, 0, 0, beta=1.0, confidence=0.95)
    assert all(v is None for v in empty.values())


def test_no_true_positive_still_gets_an_honest_interval() -> None:
    # TP = 0 among 3 positives and 27 negatives: the counts' bootstrap can only redraw 0
    # and gives [0, 0]; the population F1 may well be above 0, and the posterior says so.
    boot = bootstrap_binary(0, 2, 3, 25, beta=1.0, confidence=0.95, resamples=200, seed=1)
    assert boot["fbeta"] == (0.0, 0.0)
    got = posterior_binary(0, 2, 3, 25, beta=1.0, confidence=0.95)
    low, high = got["fbeta"] or (0.0, 0.0)
    assert 0.0 < low < 0.05 and 0.2 < high < 0.8


@pytest.mark.parametrize("cells", [(30, 4, 12, 300), (2, 1, 5, 40), (0, 3, 2, 60)])
def test_balanced_accuracy_matches_its_exact_posterior(cells: tuple[int, int, int, int]) -> None:
    # Reference: under a Dirichlet posterior recall = th_tp / (th_tp + th_fn) and specificity
    # = th_tn / (th_tn + th_fp) are independent Beta(tp + 1/2, fn + 1/2) and
    # Beta(tn + 1/2, fp + 1/2) (the neutrality of the Dirichlet); balanced accuracy is half
    # their sum. Its quantiles from 400,000 scipy Beta draws agree with ours from 10,000
    # draws to within their Monte Carlo error (a few thousandths).
    tp, fp, fn, tn = cells
    rng = np.random.default_rng(77)
    reference = 0.5 * (
        beta_law.rvs(tp + 0.5, fn + 0.5, size=400_000, random_state=rng)
        + beta_law.rvs(tn + 0.5, fp + 0.5, size=400_000, random_state=rng)
    )
    expected = np.quantile(reference, [0.05, 0.95])
    got = posterior_binary(*cells, beta=1.0, confidence=0.9, draws=10_000, seed=5)
    assert got["balanced_accuracy"] == pytest.approx(tuple(expected), abs=0.006)


def _coverage(n: int, shares: np.ndarray, windows: int, rng: np.random.Generator) -> dict:
    truth = {k: float(v[0]) for k, v in binary_arrays(*(shares[:, None]), 1.0).items()}
    hits = dict.fromkeys(truth, 0)
    for seed in range(windows):
        cells = tuple(int(c) for c in rng.multinomial(n, shares))
        got = posterior_binary(*cells, beta=1.0, confidence=0.95, seed=seed)
        for name, interval in got.items():
            hits[name] += interval is not None and interval[0] <= truth[name] <= interval[1]
    return {name: h / windows for name, h in hits.items()}


def test_coverage_at_prevalence_one_in_ten() -> None:
    # Seeded simulation: windows of n labelled items from fixed cell shares at prevalence
    # 0.1 (tp, fp, fn, tn) = (0.07, 0.09, 0.03, 0.81) (recall 0.7, specificity 0.9, population
    # F1 0.538, MCC 0.491, balanced accuracy 0.8), n in {30, 50, 100, 200, 400}, 1,000
    # windows each, the default draws, 95% intervals; MCSE of a 0.95 coverage 0.007.
    # Asserted: F1 coverage >= 0.92 from 100 items (the brief's floor), and every measure's
    # coverage within [0.90, 0.985] at every n (measured 0.93-0.96; the counts' percentile
    # bootstrap gave F1 0.84, MCC 0.79 and balanced accuracy 0.52 at 30 items). Brown, Cai
    # and DasGupta (2001) for why the Jeffreys prior keeps coverage near nominal.
    shares = np.array([0.07, 0.09, 0.03, 0.81])
    rng = np.random.default_rng(2001)
    for n in (30, 50, 100, 200, 400):
        coverage = _coverage(n, shares, 1000, rng)
        if n >= 100:
            assert coverage["fbeta"] >= 0.92, (n, coverage)
        for name, value in coverage.items():
            assert 0.90 <= value <= 0.985, (n, name, value)


def test_coverage_with_a_strong_classifier_and_rare_positives() -> None:
    # As above with (tp, fp, fn, tn) = (0.045, 0.01, 0.005, 0.94): prevalence 0.05, recall
    # 0.9, precision 0.82, F1 0.857; n in {100, 300}; 1,000 windows each.
    shares = np.array([0.045, 0.01, 0.005, 0.94])
    rng = np.random.default_rng(2002)
    for n in (100, 300):
        coverage = _coverage(n, shares, 1000, rng)
        assert coverage["fbeta"] >= 0.92, (n, coverage)
        for name, value in coverage.items():
            assert 0.90 <= value <= 0.985, (n, name, value)


def test_default_draws_are_the_documented_number() -> None:
    assert DEFAULT_DRAWS >= 700


def test_the_window_summary_uses_the_posterior_intervals() -> None:
    y, p = breast_cancer_scores()
    stats = window_from(y, p)
    out = summarise(stats, confidence=0.9, seed=2)["measures"]
    expected = posterior_binary(stats.tp, stats.fp, stats.fn, stats.tn, beta=1.0,
                                confidence=0.9, seed=2)  # fmt: skip
    for name, interval in expected.items():
        assert interval is not None
        assert (out[name]["low"], out[name]["high"]) == interval
