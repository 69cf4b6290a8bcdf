"""Threshold sweep over the 100 histogram bin edges.

Threshold t = k/100 (k = 0..99) calls a labelled prediction positive when its score is at
least t, i.e. when its bin is k or above. Each row gives precision, recall, F-beta and the
positive rate (over labelled predictions) at that threshold; undefined values are None.
Scores within one float rounding of an edge follow `score_bin`, which may put them one bin
lower than an exact comparison would.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from belated.stats.ranking import N_BINS

SweepRow = dict[str, float | int | None]


def _ratio(numerator: np.ndarray, denominator: np.ndarray) -> list[float | None]:
    """Elementwise ratio as plain floats, None where the denominator is 0."""
    return [
        None if d == 0 else n / d
        for n, d in zip(numerator.tolist(), denominator.tolist(), strict=True)
    ]


def sweep(
    hist_pos: np.ndarray,
    hist_neg: np.ndarray,
    *,
    beta: float = 1.0,
    precision_target: float | None = None,
    recall_target: float | None = None,
) -> dict[str, Any]:
    """Every measure at every bin edge, the best F-beta, and the thresholds meeting targets.

    `best_fbeta` is the row with the highest F-beta (the lowest threshold among ties);
    `for_precision` the lowest threshold whose precision is at least the target;
    `for_recall` the highest threshold whose recall is at least the target. Each is None
    when no threshold qualifies or no target was given.
    """
    pos = np.asarray(hist_pos, dtype=np.int64)
    neg = np.asarray(hist_neg, dtype=np.int64)
    if pos.shape != (N_BINS,) or neg.shape != (N_BINS,):
        raise ValueError(f"histograms must have {N_BINS} bins")
    tp = np.cumsum(pos[::-1])[::-1]
    fp = np.cumsum(neg[::-1])[::-1]
    n_pos = int(pos.sum())
    n_all = n_pos + int(neg.sum())
    fn = n_pos - tp
    b2 = beta * beta
    precision = _ratio(tp, tp + fp)
    recall = _ratio(tp, np.full(N_BINS, n_pos))
    fbeta = _ratio((1.0 + b2) * tp, (1.0 + b2) * tp + b2 * fn + fp)
    positive_rate = _ratio(tp + fp, np.full(N_BINS, n_all))
    rows: list[SweepRow] = [
        {
            "threshold": k / N_BINS,
            "precision": precision[k],
            "recall": recall[k],
            "fbeta": fbeta[k],
            "positive_rate": positive_rate[k],
            "tp": int(tp[k]),
            "fp": int(fp[k]),
            "fn": int(fn[k]),
            "tn": int(neg.sum() - fp[k]),
        }
        for k in range(N_BINS)
    ]
    return {
        "sweep": rows,
        "best_fbeta": _best(rows),
        "for_precision": _first(rows, "precision", precision_target, reverse=False),
        "for_recall": _first(rows, "recall", recall_target, reverse=True),
    }


def _best(rows: list[SweepRow]) -> SweepRow | None:
    """The row of highest F-beta, the lowest threshold among ties; None if none is defined."""
    best: SweepRow | None = None
    best_value = -1.0
    for row in rows:
        value = row["fbeta"]
        if value is not None and value > best_value:
            best, best_value = row, float(value)
    return best


def _first(
    rows: list[SweepRow], name: str, target: float | None, *, reverse: bool
) -> SweepRow | None:
    """The first row (from the top when `reverse`) whose measure reaches the target."""
    if target is None:
        return None
    for row in reversed(rows) if reverse else rows:
        value = row[name]
        if value is not None and value >= target:
            return row
    return None
