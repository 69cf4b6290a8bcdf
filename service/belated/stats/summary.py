"""One window's measures, intervals, label-free estimates and coverage bounds, JSON-ready.

This is what the API, the jobs, the dashboard and the CLI call. Every measure of the table
in DESIGN.md is present, as {"value", "low", "high"} or, when undefined, with a "reason"
and nulls. Intervals: the chosen proportion interval for proportions, a seeded bootstrap of
the confusion counts for fbeta, mcc and balanced_accuracy, Hanley-McNeil for roc_auc, none
for average_precision, brier, log_loss and ece.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from belated.stats.bootstrap import (
    BOOTSTRAPPED_BINARY,
    DEFAULT_RESAMPLES,
    Interval,
    attach,
    bootstrap_binary,
    check_resamples,
)
from belated.stats.bounds import coverage_bounds
from belated.stats.calibration import brier, ece, log_loss
from belated.stats.estimates import em_prior, expected_measures
from belated.stats.fbeta import resolve_beta
from belated.stats.intervals import (
    check_confidence,
    check_method,
    clopper_pearson,
    jeffreys,
    wilson,
    z_value,
)
from belated.stats.measures import (
    BINARY_MEASURES,
    NO_ACTUAL_NEGATIVES,
    NO_ACTUAL_POSITIVES,
    NO_PREDICTED_NEGATIVES,
    NO_PREDICTED_POSITIVES,
    NO_PREDICTIONS,
    NOTHING_LABELLED,
    balanced_accuracy,
    fbeta_value,
    mcc,
)
from belated.stats.multiclass import summarise_multiclass
from belated.stats.ranking import ranking_measures
from belated.stats.values import Value
from belated.stats.window import WindowStats

__all__ = ["BINARY_MEASURES", "check_measures", "summarise", "summarise_multiclass"]


def check_measures(measures: Iterable[str] | None) -> frozenset[str]:
    """The requested measure names (all when None); ValueError naming any unknown one."""
    if measures is None:
        return frozenset(BINARY_MEASURES)
    wanted = frozenset(measures)
    unknown = sorted(wanted - set(BINARY_MEASURES))
    if unknown:
        raise ValueError(
            f"unknown measures: {', '.join(unknown)}; choose from {', '.join(BINARY_MEASURES)}"
        )
    return wanted


def _proportion(
    successes: int, n: int, reason: str, method: str, confidence: float, z: float
) -> dict[str, Any]:
    """successes / n with its interval as a measure dict, or undefined when n = 0."""
    if n == 0:
        return {"value": None, "low": None, "high": None, "reason": reason}
    if method == "wilson":
        low, high = wilson(successes, n, z)
    elif method == "clopper-pearson":
        low, high = clopper_pearson(successes, n, confidence)
    else:
        low, high = jeffreys(successes, n, confidence)
    return {"value": successes / n, "low": low, "high": high}


def summarise(
    stats: WindowStats,
    *,
    beta: float = 1.0,
    interval: str = "wilson",
    confidence: float = 0.95,
    resamples: int = DEFAULT_RESAMPLES,
    seed: int = 0,
    measures: set[str] | None = None,
    baseline_prior: float | None = None,
) -> dict[str, Any]:
    """Confusion counts, measures with intervals, estimates and bounds of one binary window.

    `baseline_prior` (the training or baseline share of positives), when given, adds the
    EM re-estimated prior of the window as estimates["prior_em"].
    """
    beta = resolve_beta(beta)
    method = check_method(interval)
    confidence = check_confidence(confidence)
    z = z_value(confidence)
    resamples = check_resamples(resamples)
    wanted = check_measures(measures)
    # Plain ints whatever the store handed over (numpy scalars would leak into the JSON).
    tp, fp, fn, tn = int(stats.tp), int(stats.fp), int(stats.fn), int(stats.tn)
    n_pred, n_pred_pos = int(stats.n_pred), int(stats.n_pred_pos)
    n_labelled = tp + fp + fn + tn
    # (successes, trials, reason when trials = 0) of the measures that are proportions;
    # the same definitions as belated.stats.measures, spelled out for speed.
    proportions = {
        "precision": (tp, tp + fp, NO_PREDICTED_POSITIVES),
        "recall": (tp, tp + fn, NO_ACTUAL_POSITIVES),
        "accuracy": (tp + tn, n_labelled, NOTHING_LABELLED),
        "specificity": (tn, tn + fp, NO_ACTUAL_NEGATIVES),
        "npv": (tn, tn + fn, NO_PREDICTED_NEGATIVES),
        "positive_rate": (n_pred_pos, n_pred, NO_PREDICTIONS),
        "prevalence": (tp + fn, n_labelled, NOTHING_LABELLED),
    }
    boot: dict[str, Interval] = {}
    if wanted.intersection(BOOTSTRAPPED_BINARY):
        boot = bootstrap_binary(
            tp, fp, fn, tn, beta=beta, confidence=confidence, resamples=resamples, seed=seed
        )
    ranked: tuple[Value, Value] | None = None
    if "roc_auc" in wanted or "average_precision" in wanted:
        ranked = ranking_measures(stats.hist_pos, stats.hist_neg, z=z)
    out: dict[str, dict[str, Any]] = {}
    for name in BINARY_MEASURES:
        if name not in wanted:
            continue
        spec = proportions.get(name)
        if spec is not None:
            out[name] = _proportion(spec[0], spec[1], spec[2], method, confidence, z)
            continue
        if name == "fbeta":
            value = attach(fbeta_value(tp, fp, fn, beta), boot.get(name))
        elif name == "mcc":
            value = attach(mcc(tp, fp, fn, tn), boot.get(name))
        elif name == "balanced_accuracy":
            value = attach(balanced_accuracy(tp, fp, fn, tn), boot.get(name))
        elif name == "roc_auc" and ranked is not None:
            value = ranked[0]
        elif name == "average_precision" and ranked is not None:
            value = ranked[1]
        elif name == "brier":
            value = brier(stats.brier_sum, n_labelled)
        elif name == "log_loss":
            value = log_loss(stats.logloss_sum, n_labelled)
        else:
            value = ece(stats.hist_pos, stats.ssum_pos, stats.hist_neg, stats.ssum_neg)
        out[name] = value.to_dict()
    return {
        "confusion": {"tp": tp, "fp": fp, "fn": fn, "tn": tn},
        "measures": out,
        "estimates": _estimates(stats, beta, baseline_prior),
        "bounds": coverage_bounds(tp, fp, fn, tn, n_pred_pos=n_pred_pos, n_pred=n_pred, beta=beta),
    }


def _estimates(
    stats: WindowStats, beta: float, baseline_prior: float | None
) -> dict[str, dict[str, Any]]:
    """Label-free estimates as {"value": ...} (plus "reason" when undefined)."""
    estimated = expected_measures(
        float(stats.exp_tp),
        float(stats.exp_fp),
        float(stats.exp_fn),
        float(stats.exp_tn),
        beta=beta,
    )
    out: dict[str, dict[str, Any]] = {}
    for name, value in estimated.items():
        out[name] = {"value": value.value}
        if value.reason is not None:
            out[name]["reason"] = value.reason
    if baseline_prior is not None:
        prior = em_prior(stats.hist_all, stats.ssum_all, baseline_prior)
        out["prior_em"] = (
            {"value": prior}
            if prior is not None
            else {"value": None, "reason": "no predictions or no valid baseline prior"}
        )
    return out
