"""Per-window columns of the binary summary, computed for many windows in one numpy pass.

Each function returns, for every window in order, the JSON-ready measure dicts (or the
plain lists they are made from); `belated.stats.summary` assembles them per window.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np

from belated.stats.delong import delong_arrays, delong_interval_arrays
from belated.stats.intervals import proportion_interval_arrays
from belated.stats.measures import (
    NO_ACTUAL_NEGATIVES,
    NO_ACTUAL_POSITIVES,
    NO_PREDICTED_NEGATIVES,
    NO_PREDICTED_POSITIVES,
    NO_PREDICTIONS,
    NOTHING_LABELLED,
)
from belated.stats.ranking import ranking_arrays
from belated.stats.window import WindowStats

MeasureDict = dict[str, Any]

# The measures that are proportions, and the reason each is undefined when its trials are 0.
PROPORTIONS: dict[str, str] = {
    "precision": NO_PREDICTED_POSITIVES,
    "recall": NO_ACTUAL_POSITIVES,
    "accuracy": NOTHING_LABELLED,
    "specificity": NO_ACTUAL_NEGATIVES,
    "npv": NO_PREDICTED_NEGATIVES,
    "positive_rate": NO_PREDICTIONS,
    "prevalence": NOTHING_LABELLED,
}
RANKED = ("roc_auc", "average_precision")


def stacked(arrays: list[np.ndarray]) -> np.ndarray:
    """Rows of a 2-D array; a view for a single window (np.stack copies, and costs more)."""
    return arrays[0][None, :] if len(arrays) == 1 else np.stack(arrays)


def undefined(reason: str) -> MeasureDict:
    """An undefined measure's dict: nulls and the reason."""
    return {"value": None, "low": None, "high": None, "reason": reason}


def proportion_columns(
    counts: np.ndarray, method: str, confidence: float, z: float
) -> dict[str, tuple[list[float], list[float], list[float], list[int]]]:
    """Per proportion: values, lows, highs and trials of every window, as plain lists.

    `counts` has one row per window: tp, fp, fn, tn, n_pred_pos, n_pred.
    """
    tp, fp, fn, tn, n_pred_pos, n_pred = counts.T
    labelled = tp + fp + fn + tn
    successes = np.stack([tp, tp, tp + tn, tn, tn, n_pred_pos, tp + fn])
    trials = np.stack([tp + fp, tp + fn, labelled, tn + fp, tn + fn, n_pred, labelled])
    low, high = proportion_interval_arrays(
        successes, trials, method=method, confidence=confidence, z=z
    )
    # Integer counts below 2^53 convert exactly, so x / n here equals Python's x / n.
    values = successes / np.where(trials == 0, 1, trials)
    columns = zip(values.tolist(), low.tolist(), high.tolist(), trials.tolist(), strict=True)
    return dict(zip(PROPORTIONS, columns, strict=True))


def ranked_columns(stats: Sequence[WindowStats], z: float) -> dict[str, list[MeasureDict]]:
    """roc_auc (with the logit-scale DeLong interval) and average_precision of every window.

    The interval is null where DeLong's variance needs a second member of a class.
    """
    hist_pos = stacked([s.hist_pos for s in stats])
    hist_neg = stacked([s.hist_neg for s in stats])
    arrays = ranking_arrays(hist_pos, hist_neg)
    variance = delong_arrays(hist_pos, hist_neg)["variance"]
    low, high = delong_interval_arrays(arrays["roc_auc"], variance, z)
    out: dict[str, list[MeasureDict]] = {"roc_auc": [], "average_precision": []}
    rows = zip(
        arrays["n_pos"].tolist(),
        arrays["n_neg"].tolist(),
        arrays["roc_auc"].tolist(),
        low.tolist(),
        high.tolist(),
        arrays["average_precision"].tolist(),
        strict=True,
    )
    for n_pos, n_neg, auc, auc_low, auc_high, ap in rows:
        if n_pos == 0 or n_neg == 0:
            missing = undefined(NO_ACTUAL_POSITIVES if n_pos == 0 else NO_ACTUAL_NEGATIVES)
            out["roc_auc"].append(missing)
            out["average_precision"].append(dict(missing))
        else:
            no_interval = math.isnan(auc_low)
            out["roc_auc"].append(
                {
                    "value": auc,
                    "low": None if no_interval else auc_low,
                    "high": None if no_interval else auc_high,
                }
            )
            out["average_precision"].append({"value": ap, "low": None, "high": None})
    return out
