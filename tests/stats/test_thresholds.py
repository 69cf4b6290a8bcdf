"""Threshold sweep over the bin edges (belated/stats/thresholds.py)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics

from belated.stats.thresholds import sweep

from .builders import breast_cancer_scores, window_from


def _sweep(beta: float = 1.0, **targets: float) -> tuple[dict, np.ndarray, np.ndarray]:
    y, p = breast_cancer_scores()
    stats = window_from(y, p)
    return sweep(stats.hist_pos, stats.hist_neg, beta=beta, **targets), y, p


@pytest.mark.parametrize("beta", [0.5, 2.0])
def test_every_row_matches_scikit_learn_at_that_threshold(beta: float) -> None:
    # Reference library: scikit-learn precision_score, recall_score and fbeta_score with
    # y_pred = score >= t on load_breast_cancer predictions. Where nothing is flagged
    # scikit-learn reports 0 (zero_division); we report None.
    result, y, p = _sweep(beta)
    rows = result["sweep"]
    assert [row["threshold"] for row in rows] == pytest.approx([k / 100 for k in range(100)])
    for row in rows:
        y_pred = (p >= row["threshold"]).astype(np.int64)
        precision, recall, fbeta, _ = metrics.precision_recall_fscore_support(
            y, y_pred, beta=beta, average="binary", zero_division=0.0
        )
        if y_pred.sum() == 0:
            assert row["precision"] is None
        else:
            assert row["precision"] == pytest.approx(precision, rel=1e-12)
        assert row["recall"] == pytest.approx(recall, rel=1e-12)
        assert row["fbeta"] == pytest.approx(fbeta, rel=1e-12, abs=1e-15)
        assert row["positive_rate"] == pytest.approx(y_pred.mean(), rel=1e-12)


def test_best_fbeta_is_the_maximum_over_the_edges() -> None:
    result, y, p = _sweep(1.0)
    # The F1 at each edge, counted plainly from the raw scores.
    scores = []
    for k in range(100):
        flagged = p >= k / 100
        tp = int((flagged & (y == 1)).sum())
        scores.append(2 * tp / (flagged.sum() + (y == 1).sum()))
    best = result["best_fbeta"]
    assert best["fbeta"] == pytest.approx(max(scores), rel=1e-12)
    assert best["threshold"] == pytest.approx(int(np.argmax(scores)) / 100)


def test_targets_pick_the_lowest_and_highest_qualifying_thresholds() -> None:
    result, y, p = _sweep(precision_target=0.95, recall_target=0.9)
    rows = result["sweep"]
    chosen = result["for_precision"]
    assert chosen["precision"] >= 0.95
    assert all(r["precision"] is None or r["precision"] < 0.95
               for r in rows if r["threshold"] < chosen["threshold"])  # fmt: skip
    chosen = result["for_recall"]
    assert chosen["recall"] >= 0.9
    assert all(r["recall"] < 0.9 for r in rows if r["threshold"] > chosen["threshold"])


def test_unreachable_or_missing_targets_give_none() -> None:
    result, _, _ = _sweep(precision_target=1.01)
    assert result["for_precision"] is None
    assert result["for_recall"] is None


def test_empty_histograms() -> None:
    zeros = np.zeros(100, dtype=np.int64)
    result = sweep(zeros, zeros, precision_target=0.5, recall_target=0.5)
    assert result["best_fbeta"] is None
    assert all(row["precision"] is None and row["recall"] is None for row in result["sweep"])


def test_wrong_histogram_length_is_refused() -> None:
    with pytest.raises(ValueError):
        sweep(np.zeros(10), np.zeros(10))
