"""Binary measures from confusion counts (belated/stats/measures.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn import metrics

from belated.stats import measures
from belated.stats.values import Value

from .builders import breast_cancer_scores, window_from


def _counts(y: np.ndarray, y_pred: np.ndarray) -> tuple[int, int, int, int]:
    tp = int(((y == 1) & (y_pred == 1)).sum())
    fp = int(((y == 0) & (y_pred == 1)).sum())
    fn = int(((y == 1) & (y_pred == 0)).sum())
    tn = int(((y == 0) & (y_pred == 0)).sum())
    return tp, fp, fn, tn


@pytest.mark.parametrize("threshold", [0.2, 0.5, 0.8])
def test_count_measures_match_scikit_learn_on_breast_cancer(threshold: float) -> None:
    # Reference library: scikit-learn, on a logistic model's predictions for load_breast_cancer.
    y, p = breast_cancer_scores()
    y_pred = (p >= threshold).astype(np.int64)
    stats = window_from(y, p, threshold)
    got = measures.binary_measures(stats.tp, stats.fp, stats.fn, stats.tn, beta=2.0)
    expected = {
        "precision": metrics.precision_score(y, y_pred),
        "recall": metrics.recall_score(y, y_pred),
        "fbeta": metrics.fbeta_score(y, y_pred, beta=2.0),
        "accuracy": metrics.accuracy_score(y, y_pred),
        "specificity": metrics.recall_score(y, y_pred, pos_label=0),
        "npv": metrics.precision_score(y, y_pred, pos_label=0),
        "balanced_accuracy": metrics.balanced_accuracy_score(y, y_pred),
        "mcc": metrics.matthews_corrcoef(y, y_pred),
        "positive_rate": float(y_pred.mean()),
        "prevalence": float(y.mean()),
    }
    for name, value in expected.items():
        assert got[name].value == pytest.approx(value, rel=1e-12, abs=1e-15), name


@pytest.mark.parametrize("beta", [0.5, 1.0, 2.0])
def test_fbeta_matches_scikit_learn_for_each_beta(beta: float) -> None:
    # Reference library: scikit-learn fbeta_score on load_breast_cancer predictions.
    y, p = breast_cancer_scores()
    y_pred = (p >= 0.5).astype(np.int64)
    tp, fp, fn, _ = _counts(y, y_pred)
    expected = metrics.fbeta_score(y, y_pred, beta=beta)
    assert measures.fbeta_value(tp, fp, fn, beta).value == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize(
    ("name", "call", "reason"),
    [
        ("precision", lambda: measures.precision(0, 0), "no predicted positives"),
        ("recall", lambda: measures.recall(0, 0), "no actual positives"),
        ("specificity", lambda: measures.specificity(0, 0), "no actual negatives"),
        ("npv", lambda: measures.npv(0, 0), "no predicted negatives"),
        ("accuracy", lambda: measures.accuracy(0, 0, 0, 0), "nothing labelled"),
        ("prevalence", lambda: measures.prevalence(0, 0, 0, 0), "nothing labelled"),
        ("positive_rate", lambda: measures.positive_rate(0, 0), "no predictions"),
        ("balanced", lambda: measures.balanced_accuracy(0, 3, 0, 5), "no actual positives"),
        ("mcc", lambda: measures.mcc(4, 0, 2, 0), "no actual negatives"),
        ("fbeta", lambda: measures.fbeta_value(0, 0, 0, 1.0), "no predicted or actual positives"),
    ],
)
def test_zero_denominator_is_undefined_with_a_reason(name: str, call, reason: str) -> None:
    value: Value = call()
    assert value.value is None, name
    assert value.reason == reason
    assert value.to_dict() == {"value": None, "low": None, "high": None, "reason": reason}


def test_fbeta_with_no_true_positive_is_zero_not_undefined() -> None:
    for fp, fn in [(3, 0), (0, 4), (2, 5)]:
        assert measures.fbeta_value(0, fp, fn, 1.0).value == 0.0
        assert measures.fbeta_value(0, fp, fn, 2.0).value == 0.0


def test_defined_values_are_finite_for_any_small_counts() -> None:
    # No NaN and no exception anywhere on a grid of small counts, including all zeros.
    for tp in range(3):
        for fp in range(3):
            for fn in range(3):
                for tn in range(3):
                    for value in measures.binary_measures(tp, fp, fn, tn).values():
                        assert value.value is None or math.isfinite(value.value)
                        assert (value.value is None) == (value.reason is not None)


def test_majority_class_classifier() -> None:
    # Common practice: a classifier that always says the majority class (negative) scores
    # accuracy equal to the majority share, recall 0, and has no precision at all.
    tp, fp, fn, tn = 0, 0, 37, 463
    assert measures.accuracy(tp, fp, fn, tn).value == pytest.approx(463 / 500)
    assert measures.recall(tp, fn).value == 0.0
    assert measures.precision(tp, fp).value is None
    assert measures.fbeta_value(tp, fp, fn, 1.0).value == 0.0


def test_all_positive_classifier() -> None:
    # Common practice: flagging everything gives recall 1 and precision equal to prevalence.
    tp, fp, fn, tn = 37, 463, 0, 0
    assert measures.recall(tp, fn).value == 1.0
    prevalence = measures.prevalence(tp, fp, fn, tn).value
    assert measures.precision(tp, fp).value == pytest.approx(prevalence)
    assert measures.specificity(tn, fp).value == 0.0


def test_mcc_sign_and_extremes() -> None:
    assert measures.mcc(10, 0, 0, 10).value == pytest.approx(1.0)
    assert measures.mcc(0, 10, 10, 0).value == pytest.approx(-1.0)
    assert measures.mcc(5, 5, 5, 5).value == pytest.approx(0.0)


def test_positive_rate_defaults_to_labelled_predictions() -> None:
    got = measures.binary_measures(3, 2, 1, 4)
    assert got["positive_rate"].value == pytest.approx(5 / 10)
    got = measures.binary_measures(3, 2, 1, 4, n_pred_pos=20, n_pred=50)
    assert got["positive_rate"].value == pytest.approx(20 / 50)
