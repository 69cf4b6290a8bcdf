"""Label coverage bounds: where the measures can lie, whatever the missing labels turn out to be.

Manski's (1989) worst-case bounds. The best case takes the unlabelled predicted positives
(u_p) as actual positives and the unlabelled predicted negatives (u_n) as actual negatives;
the worst case the reverse. With n_pp all predicted positives:

    precision in [tp / n_pp, (tp + u_p) / n_pp]
    recall    in [tp / (tp + fn + u_n), (tp + u_p) / (tp + u_p + fn)]
    F-beta    between its values in the two cases (it rises with TP and falls with FP, FN).

A side is None when the measure is undefined in that case (e.g. no predicted positives).
"""

from __future__ import annotations

from belated.stats.fbeta import fbeta_from_counts

Bound = dict[str, float | None]


def _div(numerator: int, denominator: int) -> float | None:
    return None if denominator == 0 else numerator / denominator


def coverage_bounds(
    tp: int, fp: int, fn: int, tn: int, *, n_pred_pos: int, n_pred: int, beta: float = 1.0
) -> dict[str, Bound] | None:
    """Worst-case bounds for precision, recall and F-beta; None with nothing unlabelled."""
    u_p = n_pred_pos - tp - fp
    u_n = (n_pred - n_pred_pos) - fn - tn
    if u_p < 0 or u_n < 0:
        raise ValueError("labelled counts exceed the predictions they come from")
    if u_p + u_n == 0:
        return None
    return {
        "precision": {"low": _div(tp, n_pred_pos), "high": _div(tp + u_p, n_pred_pos)},
        "recall": {"low": _div(tp, tp + fn + u_n), "high": _div(tp + u_p, tp + u_p + fn)},
        "fbeta": {
            "low": fbeta_from_counts(tp, fp + u_p, fn + u_n, beta),
            "high": fbeta_from_counts(tp + u_p, fp, fn, beta),
        },
    }
