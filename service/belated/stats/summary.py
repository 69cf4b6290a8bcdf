"""Windows' measures, intervals, label-free estimates and coverage bounds, JSON-ready.

This is what the API, the jobs, the dashboard and the CLI call. Every measure of the table
in DESIGN.md is present, as {"value", "low", "high"} or, when undefined, with a "reason"
and nulls. Intervals: the chosen proportion interval for proportions, seeded posterior draws
of the cell shares (Jeffreys prior; `belated.stats.posterior`, `resamples` draws) for fbeta,
mcc and balanced_accuracy, DeLong (logit scale) for roc_auc, none
for average_precision, brier, log_loss and ece.

`summarise_many` does the arithmetic of many windows at once (one numpy pass per measure
instead of one per window); `summarise` is the same for one window, and every window's
answer is the same whichever of the two computed it, whatever the other windows are.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np

from belated.stats.bootstrap import BOOTSTRAPPED_BINARY, Interval, check_resamples
from belated.stats.bounds import coverage_bounds
from belated.stats.calibration import ece_arrays
from belated.stats.columns import (
    PROPORTIONS,
    RANKED,
    MeasureDict,
    proportion_columns,
    ranked_columns,
    stacked,
    undefined,
)
from belated.stats.estimates import em_prior, expected_measures
from belated.stats.fbeta import resolve_beta
from belated.stats.intervals import (
    check_confidence,
    check_method,
    z_value,
)
from belated.stats.measures import (
    BINARY_MEASURES,
    NOTHING_LABELLED,
    balanced_accuracy,
    fbeta_value,
    mcc,
)
from belated.stats.multiclass import summarise_multiclass
from belated.stats.posterior import DEFAULT_DRAWS, posterior_binary_many
from belated.stats.values import Value
from belated.stats.window import WindowStats

__all__ = [
    "BINARY_MEASURES",
    "check_measures",
    "summarise",
    "summarise_many",
    "summarise_multiclass",
]


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


def _with_interval(value: Value, interval: Interval) -> MeasureDict:
    if value.value is None:
        return value.to_dict()
    if interval is None:
        return {"value": value.value, "low": None, "high": None}
    return {"value": value.value, "low": interval[0], "high": interval[1]}


def _mean_of_sum(total: float, n: int) -> MeasureDict:
    if n == 0:
        return undefined(NOTHING_LABELLED)
    return {"value": float(total) / n, "low": None, "high": None}


def summarise_many(
    stats: Sequence[WindowStats],
    *,
    beta: float = 1.0,
    interval: str = "wilson",
    confidence: float = 0.95,
    resamples: int = DEFAULT_DRAWS,
    seed: int = 0,
    measures: set[str] | None = None,
    baseline_prior: float | None = None,
) -> list[dict[str, Any]]:
    """`summarise` of each window, computed together; the answers are the same."""
    beta = resolve_beta(beta)
    method = check_method(interval)
    confidence = check_confidence(confidence)
    z = z_value(confidence)
    resamples = check_resamples(resamples)
    wanted = check_measures(measures)
    if seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed}")
    if not stats:
        return []
    # Plain ints whatever the store handed over (numpy scalars would leak into the JSON).
    rows = [
        (int(s.tp), int(s.fp), int(s.fn), int(s.tn), int(s.n_pred_pos), int(s.n_pred))
        for s in stats
    ]
    proportions = proportion_columns(np.array(rows, dtype=np.int64), method, confidence, z)
    boot: list[dict[str, Interval]] = [{} for _ in rows]
    if wanted.intersection(BOOTSTRAPPED_BINARY):
        boot = posterior_binary_many(
            [r[:4] for r in rows], beta=beta, confidence=confidence, draws=resamples, seed=seed
        )
    ranked = ranked_columns(stats, z) if wanted.intersection(RANKED) else {}
    eces = (
        ece_arrays(
            stacked([s.hist_pos for s in stats]),
            stacked([s.ssum_pos for s in stats]),
            stacked([s.hist_neg for s in stats]),
            stacked([s.ssum_neg for s in stats]),
        ).tolist()
        if "ece" in wanted
        else []
    )
    answers = []
    for i, (s, (tp, fp, fn, tn, n_pred_pos, n_pred)) in enumerate(zip(stats, rows, strict=True)):
        labelled = tp + fp + fn + tn
        out: dict[str, MeasureDict] = {}
        for name in BINARY_MEASURES:
            if name not in wanted:
                continue
            if name in PROPORTIONS:
                values, lows, highs, trials = proportions[name]
                out[name] = (
                    undefined(PROPORTIONS[name])
                    if trials[i] == 0
                    else {"value": values[i], "low": lows[i], "high": highs[i]}
                )
            elif name == "fbeta":
                out[name] = _with_interval(fbeta_value(tp, fp, fn, beta), boot[i].get(name))
            elif name == "mcc":
                out[name] = _with_interval(mcc(tp, fp, fn, tn), boot[i].get(name))
            elif name == "balanced_accuracy":
                value = balanced_accuracy(tp, fp, fn, tn)
                out[name] = _with_interval(value, boot[i].get(name))
            elif name in RANKED:
                out[name] = ranked[name][i]
            elif name == "brier":
                out[name] = _mean_of_sum(s.brier_sum, labelled)
            elif name == "log_loss":
                out[name] = _mean_of_sum(s.logloss_sum, labelled)
            else:
                out[name] = (
                    undefined(NOTHING_LABELLED)
                    if math.isnan(eces[i])
                    else {"value": eces[i], "low": None, "high": None}
                )
        answers.append(
            {
                "confusion": {"tp": tp, "fp": fp, "fn": fn, "tn": tn},
                "measures": out,
                "implied": _implied(s, beta, baseline_prior),
                "bounds": coverage_bounds(
                    tp, fp, fn, tn, n_pred_pos=n_pred_pos, n_pred=n_pred, beta=beta
                ),
            }
        )
    return answers


def summarise(
    stats: WindowStats,
    *,
    beta: float = 1.0,
    interval: str = "wilson",
    confidence: float = 0.95,
    resamples: int = DEFAULT_DRAWS,
    seed: int = 0,
    measures: set[str] | None = None,
    baseline_prior: float | None = None,
) -> dict[str, Any]:
    """Confusion counts, measures with intervals, implied measures and bounds of one binary
    window.

    `baseline_prior` (the training or baseline share of positives), when given, adds the
    EM re-estimated prior of the window as implied["prior_em"]. The posterior draws are
    seeded by `seed` and the confusion counts, so the same data gives the same intervals.
    """
    return summarise_many(
        [stats],
        beta=beta,
        interval=interval,
        confidence=confidence,
        resamples=resamples,
        seed=seed,
        measures=measures,
        baseline_prior=baseline_prior,
    )[0]


def _implied(
    stats: WindowStats, beta: float, baseline_prior: float | None
) -> dict[str, dict[str, Any]]:
    """Measures implied by the scores alone (unadjusted expected counts) as {"value": ...}
    (plus "reason" when undefined); metrics/implied.py adjusts them to the window's prior."""
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
