"""Label coverage bounds (belated/stats/bounds.py)."""

from __future__ import annotations

import itertools

import pytest

from belated.stats.bounds import coverage_bounds
from belated.stats.fbeta import fbeta_from_counts


def test_hand_worked_precision_bounds() -> None:
    # Hand-worked: 100 predicted positives, 60 of them labelled, 45 true positives. The
    # 40 unlabelled ones could all be wrong (45/100) or all right (85/100).
    bounds = coverage_bounds(45, 15, 10, 150, n_pred_pos=100, n_pred=300)
    assert bounds is not None
    assert bounds["precision"] == pytest.approx({"low": 0.45, "high": 0.85})
    # Recall: 40 unlabelled predicted negatives could all be missed positives, or none.
    assert bounds["recall"] == pytest.approx({"low": 45 / 95, "high": 85 / 95})


def test_no_unlabelled_prediction_gives_no_bounds() -> None:
    assert coverage_bounds(5, 3, 2, 10, n_pred_pos=8, n_pred=20) is None


def test_inconsistent_counts_are_refused() -> None:
    with pytest.raises(ValueError):
        coverage_bounds(5, 3, 2, 10, n_pred_pos=7, n_pred=20)


@pytest.mark.parametrize("beta", [0.5, 1.0, 2.0])
def test_bounds_are_the_extremes_over_every_completion(beta: float) -> None:
    # Manski (1989) worst-case bounds, checked by brute force: give the unlabelled
    # predictions every possible number of actual positives and take the extremes.
    for tp, fp, fn, tn, u_p, u_n in itertools.product(range(3), range(3), range(3), range(2),
                                                      range(4), range(4)):  # fmt: skip
        if u_p + u_n == 0:
            continue
        bounds = coverage_bounds(
            tp, fp, fn, tn, n_pred_pos=tp + fp + u_p, n_pred=tp + fp + fn + tn + u_p + u_n,
            beta=beta,
        )  # fmt: skip
        assert bounds is not None
        precisions, recalls, fbetas = [], [], []
        for k in range(u_p + 1):  # k unlabelled predicted positives are actual positives
            for j in range(u_n + 1):  # j unlabelled predicted negatives are actual positives
                t, f, m = tp + k, fp + u_p - k, fn + j
                if t + f:
                    precisions.append(t / (t + f))
                if t + m:
                    recalls.append(t / (t + m))
                value = fbeta_from_counts(t, f, m, beta)
                if value is not None:
                    fbetas.append(value)
        got = bounds["precision"]
        if got["low"] is not None:
            assert got["low"] == pytest.approx(min(precisions))
            assert got["high"] == pytest.approx(max(precisions))
        if bounds["recall"]["low"] is not None and bounds["recall"]["high"] is not None:
            assert bounds["recall"]["low"] == pytest.approx(min(recalls))
            assert bounds["recall"]["high"] == pytest.approx(max(recalls))
        if bounds["fbeta"]["low"] is not None and bounds["fbeta"]["high"] is not None:
            assert bounds["fbeta"]["low"] == pytest.approx(min(fbetas))
            assert bounds["fbeta"]["high"] == pytest.approx(max(fbetas))
