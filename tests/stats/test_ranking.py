"""ROC AUC and average precision from score histograms (belated/stats/ranking.py)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics

from belated.stats.delong import delong_interval
from belated.stats.ranking import (
    ap_binning_bound,
    auc_binning_bound,
    average_precision,
    ranking_measures,
    roc_auc,
    score_bin,
    score_bins,
)

from .builders import breast_cancer_scores, window_from


def _hists(y: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    stats = window_from(y, p)
    return stats.hist_pos, stats.hist_neg


def _datasets() -> list[tuple[str, np.ndarray, np.ndarray]]:
    y, p = breast_cancer_scores()
    rng = np.random.default_rng(11)
    # A second, larger case with a weak signal: many positives and negatives share bins.
    y2 = (rng.random(5000) < 0.3).astype(np.int64)
    p2 = np.clip(rng.normal(0.45 + 0.1 * y2, 0.15), 0.0, 1.0)
    return [("breast_cancer", y, p), ("weak_signal", y2, p2)]


@pytest.mark.parametrize(("name", "y", "p"), _datasets())
def test_equal_to_scikit_learn_on_the_binned_scores(name: str, y: np.ndarray, p: np.ndarray):
    # Reference library: scikit-learn roc_auc_score and average_precision_score. Scores in
    # one bin are ties for us, so on the bin indices the two must agree to rounding.
    hist_pos, hist_neg = _hists(y, p)
    bins = score_bins(p)
    assert roc_auc(hist_pos, hist_neg).value == pytest.approx(
        metrics.roc_auc_score(y, bins), rel=1e-12
    )
    assert average_precision(hist_pos, hist_neg).value == pytest.approx(
        metrics.average_precision_score(y, bins), rel=1e-12
    )


@pytest.mark.parametrize(("name", "y", "p"), _datasets())
def test_close_to_scikit_learn_on_raw_scores_within_the_binning_bound(
    name: str, y: np.ndarray, p: np.ndarray
) -> None:
    # Reference library: scikit-learn on the raw scores. Tolerance: binning only changes
    # the order of a positive and a negative that share a bin (AUC counts them 1/2 where
    # the raw scores give 0 or 1), and the precision seen by a positive only within the
    # range its bin allows (AP); both bounds are computed from the histograms.
    hist_pos, hist_neg = _hists(y, p)
    auc_gap = abs(roc_auc(hist_pos, hist_neg).value - metrics.roc_auc_score(y, p))
    ap = average_precision(hist_pos, hist_neg).value
    ap_gap = abs(ap - metrics.average_precision_score(y, p))
    assert auc_gap <= auc_binning_bound(hist_pos, hist_neg) + 1e-12
    assert ap_gap <= ap_binning_bound(hist_pos, hist_neg) + 1e-12
    # The bounds are tight enough to mean something on these data.
    assert auc_binning_bound(hist_pos, hist_neg) < 0.01
    assert ap_binning_bound(hist_pos, hist_neg) < 0.05


def test_undefined_when_a_class_is_absent() -> None:
    empty = np.zeros(100, dtype=np.int64)
    some = np.zeros(100, dtype=np.int64)
    some[40] = 3
    assert roc_auc(empty, some).reason == "no actual positives"
    assert average_precision(some, empty).reason == "no actual negatives"
    auc, ap = ranking_measures(empty, empty)
    assert auc.value is None and ap.value is None


def test_perfect_and_reversed_rankings() -> None:
    pos = np.zeros(100, dtype=np.int64)
    neg = np.zeros(100, dtype=np.int64)
    pos[90], neg[10] = 5, 7
    assert roc_auc(pos, neg).value == 1.0
    assert average_precision(pos, neg).value == 1.0
    assert roc_auc(neg, pos).value == 0.0
    # All in one bin: every pair tied.
    assert roc_auc(pos, pos * 2).value == 0.5


def test_delong_interval_is_attached_with_z() -> None:
    y, p = breast_cancer_scores()
    hist_pos, hist_neg = _hists(y, p)
    z = 1.959963984540054
    value = roc_auc(hist_pos, hist_neg, z=z)
    assert value.value is not None and value.low is not None and value.high is not None
    assert value.low < value.value <= value.high <= 1.0
    expected = delong_interval(hist_pos, hist_neg, z)
    assert expected is not None
    assert (value.low, value.high) == pytest.approx(expected, rel=1e-14)


def test_score_bin_convention() -> None:
    assert score_bin(0.0) == 0
    assert score_bin(0.999) == 99
    assert score_bin(1.0) == 99
    assert score_bin(0.5) == 50
    assert score_bin(0.505) == 50
    scores = np.array([0.0, 0.01, 0.255, 0.5, 0.99, 1.0])
    assert score_bins(scores).tolist() == [score_bin(s) for s in scores]
    # 0.29 * 100 is 28.999999999999996 in binary floating point; the bin still decides as
    # `score >= 0.29` does.
    assert [score_bin(s) for s in (0.29, 0.57, 0.58)] == [29, 57, 58]


def _edge_scores() -> np.ndarray:
    """Every edge k/100 (k = 0..100), its float neighbours, and a few in between."""
    edges = np.arange(101) / 100
    around = np.concatenate(
        [edges, np.nextafter(edges, -np.inf), np.nextafter(edges, np.inf), edges + 0.005]
    )
    return np.unique(np.clip(around, 0.0, 1.0))


def test_bins_decide_every_threshold_as_the_comparison_does() -> None:
    # Reference library: scikit-learn confusion_matrix of `score >= k/100` on the raw scores,
    # for every threshold k/100 (k = 0..99) on scores at each edge and its float neighbours
    # (np.nextafter). The histogram's counts at threshold k are the bins k and above.
    scores = _edge_scores()
    rng = np.random.default_rng(29)
    y = (rng.random(scores.size) < 0.4).astype(np.int64)
    bins = score_bins(scores)
    assert bins.tolist() == [score_bin(float(s)) for s in scores]
    hist_pos = np.bincount(bins[y == 1], minlength=100)
    hist_neg = np.bincount(bins[y == 0], minlength=100)
    for k in range(100):
        tn, fp, fn, tp = metrics.confusion_matrix(y, scores >= k / 100, labels=[0, 1]).ravel()
        assert (hist_pos[k:].sum(), hist_neg[k:].sum()) == (tp, fp), k
        assert (hist_pos[:k].sum(), hist_neg[:k].sum()) == (fn, tn), k
        assert np.array_equal(bins >= k, scores >= k / 100), k


def test_threshold_one_falls_in_the_closed_last_bin() -> None:
    # k = 100: a score of exactly 1 belongs to the last bin [0.99, 1], with its neighbour
    # just below, so no bin edge separates `score >= 1`; the convention is the closed bin.
    assert score_bins(np.array([np.nextafter(1.0, 0.0), 1.0])).tolist() == [99, 99]
    assert score_bin(np.nextafter(0.99, 0.0)) == 98
