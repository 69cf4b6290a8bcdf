"""Pure decisions: given a rule and a series of windows, which windows breach, and why.

No I/O: the evaluation job loads windows and stores what this module decides. A decision
carries the value, its interval, the baseline and the p-value that made it fire, so an alert
can show its evidence. For fan-out rules the caller adjusts the p-values of one evaluation
across segments (Benjamini-Hochberg) before the final verdict: `condition` holds every part
of the verdict except the significance test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import numpy as np

from belated.alerts import catalog
from belated.stats.bootstrap import binary_arrays
from belated.stats.change import newcombe_diff_interval, two_proportion_test
from belated.stats.drift import categorical_psi, psi
from belated.stats.summary import summarise
from belated.stats.window import WindowStats

DROP_RESAMPLES = 2000


@dataclass
class WindowInput:
    """One window of one segment as a rule sees it."""

    start: datetime
    end: datetime
    closed: bool
    settled: bool
    stats: WindowStats
    tag_counts: dict[str, int] = field(default_factory=dict)


@dataclass
class Decision:
    """The verdict on one window."""

    start: datetime
    end: datetime
    condition: bool
    p_value: float | None
    value: float | None = None
    low: float | None = None
    high: float | None = None
    baseline: dict[str, Any] | None = None

    def breached(self, alpha: float, adjusted_p: float | None = None) -> bool:
        """Final verdict; `adjusted_p` replaces the raw p-value after BH."""
        p = adjusted_p if adjusted_p is not None else self.p_value
        return self.condition and (p is None or p < alpha)


def _confusion(s: WindowStats) -> dict[str, int]:
    return {"tp": s.tp, "fp": s.fp, "fn": s.fn, "tn": s.tn}


def measure_value(
    measure: str, s: WindowStats, beta: float, confidence: float
) -> tuple[float | None, float | None, float | None]:
    """A measure's value and interval in one window (estimates for estimated_*)."""
    if measure.startswith("estimated_"):
        est = summarise(s, beta=beta, measures={"precision"}, resamples=1)["estimates"]
        value = est.get(measure.removeprefix("estimated_"), {}).get("value")
        return value, None, None
    out = summarise(s, beta=beta, confidence=confidence, measures={measure})["measures"][measure]
    return out["value"], out["low"], out["high"]


def eligible(rule_kind: str, measure: str | None, w: WindowInput, min_support: int) -> bool:
    """Label-based rules see settled windows with support; the rest every closed window."""
    if not w.closed:
        return False
    if rule_kind in ("floor", "drop") and measure and catalog.is_label_based(measure):
        return w.settled and catalog.support(measure, _confusion(w.stats)) >= min_support
    return True


def pooled(windows: list[WindowInput]) -> WindowStats:
    """The stats of several windows merged."""
    total = WindowStats.empty()
    for w in windows:
        total = total.merge(w.stats)
    return total


def baseline_for(
    series: list[WindowInput], i: int, rule: dict[str, Any], fixed: WindowStats | None
) -> tuple[WindowStats | None, list[WindowInput]]:
    """The trailing baseline windows before series[i] (or the fixed range's stats)."""
    if fixed is not None:
        return fixed, []
    n = int(rule["baseline"].get("windows") or 7)
    measure = rule.get("measure") or ""
    label_based = catalog.is_label_based(measure)
    picked = [w for w in series[:i] if w.closed and (w.settled or not label_based)][-n:]
    return (pooled(picked) if picked else None), picked


def _p_drop_proportion(x1: int, n1: int, x2: int, n2: int, tolerance: float) -> float:
    """One-sided p-value of H0: p1 - p2 >= -tolerance by inverting Newcombe's interval."""

    def upper(alpha: float) -> float:
        return newcombe_diff_interval(x1, n1, x2, n2, confidence=1 - 2 * alpha)[1]

    if upper(0.5 - 1e-9) >= -tolerance:
        return 1.0
    lo, hi = 1e-12, 0.5 - 1e-9  # upper(alpha) falls as alpha grows; find where it crosses
    if upper(lo) < -tolerance:
        return lo
    for _ in range(60):
        mid = (lo + hi) / 2
        if upper(mid) < -tolerance:
            hi = mid
        else:
            lo = mid
    return hi


def _p_drop_bootstrap(
    measure: str, cur: WindowStats, base: WindowStats, beta: float, tolerance: float, seed: int
) -> float | None:
    """One-sided bootstrap p-value of H0: current - baseline >= -tolerance."""

    def draws(s: WindowStats, rng: np.random.Generator) -> np.ndarray:
        counts = np.array([s.tp, s.fp, s.fn, s.tn], dtype=np.float64)
        n = int(counts.sum())
        m = rng.multinomial(n, counts / n, size=DROP_RESAMPLES).T.astype(np.float64)
        return binary_arrays(m[0], m[1], m[2], m[3], beta)[measure]

    if measure not in ("fbeta", "mcc", "balanced_accuracy"):
        return None
    if cur.tp + cur.fp + cur.fn + cur.tn == 0 or base.tp + base.fp + base.fn + base.tn == 0:
        return None
    rng = np.random.default_rng(seed)
    diff = draws(cur, rng) - draws(base, rng)
    diff = diff[~np.isnan(diff)]
    if diff.size == 0:
        return None
    return float((np.count_nonzero(diff >= -tolerance) + 1) / (diff.size + 1))


def _drop(rule: dict[str, Any], w: WindowInput, base: WindowStats, beta: float) -> Decision:
    measure, tol = rule["measure"], float(rule["tolerance"])
    value, low, high = measure_value(measure, w.stats, beta, 1 - 2 * float(rule["alpha"]))
    base_value, _, _ = measure_value(measure, base, beta, 0.95)
    info = {"value": base_value}
    if value is None or base_value is None:
        return Decision(w.start, w.end, False, None, value, low, high, info)
    p: float | None
    parts = catalog.PROPORTIONS.get(measure)
    if measure == "positive_rate":
        p = _p_drop_proportion(
            w.stats.n_pred_pos, w.stats.n_pred, base.n_pred_pos, base.n_pred, tol
        )
    elif parts is not None:
        cur_c, base_c = _confusion(w.stats), _confusion(base)
        x1, n1 = sum(cur_c[k] for k in parts[0]), sum(cur_c[k] for k in parts[1])
        x2, n2 = sum(base_c[k] for k in parts[0]), sum(base_c[k] for k in parts[1])
        p = _p_drop_proportion(x1, n1, x2, n2, tol)
    else:
        seed = int(w.start.timestamp()) & 0x7FFFFFFF
        p = _p_drop_bootstrap(measure, w.stats, base, beta, tol, seed)
    info.update(drop=(base_value - value), tolerance=tol)
    return Decision(w.start, w.end, value < base_value - tol, p, value, low, high, info)


def _shift(
    rule: dict[str, Any], w: WindowInput, base: WindowStats, base_windows: list[WindowInput]
) -> Decision:
    measure, threshold = rule["measure"], float(rule["threshold"])
    if measure == "positive_rate":
        if w.stats.n_pred == 0 or base.n_pred == 0:
            return Decision(w.start, w.end, False, None)
        cur_rate, base_rate = w.stats.n_pred_pos / w.stats.n_pred, base.n_pred_pos / base.n_pred
        test = two_proportion_test(w.stats.n_pred_pos, w.stats.n_pred, base.n_pred_pos, base.n_pred)
        return Decision(
            w.start,
            w.end,
            abs(cur_rate - base_rate) >= threshold,
            test.p_two_sided,
            cur_rate,
            None,
            None,
            {"value": base_rate, "change": cur_rate - base_rate},
        )
    if measure == "score_psi":
        v = psi(base.hist_all, w.stats.hist_all)
        return Decision(
            w.start,
            w.end,
            v.value is not None and v.value >= threshold,
            None,
            v.value,
            None,
            None,
            {"predictions": base.n_pred},
        )
    base_counts: dict[str, int] = {}
    for b in base_windows:
        for k, n in b.tag_counts.items():
            base_counts[k] = base_counts.get(k, 0) + n
    v = categorical_psi(base_counts, w.tag_counts)
    return Decision(
        w.start,
        w.end,
        v.value is not None and v.value >= threshold,
        None,
        v.value,
        None,
        None,
        {"counts": base_counts},
    )


def decide(
    rule: dict[str, Any],
    series: list[WindowInput],
    first: int,
    *,
    beta: float = 1.0,
    fixed_baseline: WindowStats | None = None,
    now: datetime | None = None,
    label_delay_days: float = 30.0,
) -> list[Decision]:
    """Decisions for the eligible windows series[first:] (baselines look further back)."""
    kind, measure = rule["kind"], rule.get("measure")
    out: list[Decision] = []
    for i in range(first, len(series)):
        w = series[i]
        if not eligible(kind, measure, w, int(rule["min_support"])):
            continue
        if kind == "floor":
            conf = 1 - 2 * float(rule["alpha"]) if rule["mode"] == "confident" else 0.95
            value, low, high = measure_value(str(measure), w.stats, beta, conf)
            probe = high if rule["mode"] == "confident" else value
            cond = probe is not None and probe < float(rule["threshold"])
            out.append(
                Decision(
                    w.start, w.end, cond, None, value, low, high, {"threshold": rule["threshold"]}
                )
            )
        elif kind == "volume":
            n = w.stats.n_pred
            low, high = rule.get("low"), rule.get("high")
            cond = (low is not None and n < low) or (high is not None and n > high)
            out.append(
                Decision(
                    w.start, w.end, cond, None, float(n), None, None, {"low": low, "high": high}
                )
            )
        elif kind == "stall":
            if rule.get("threshold") is None or now is None:
                continue
            old = (now - w.end).total_seconds() > label_delay_days * 86400
            if not old or w.stats.n_pred == 0:
                continue
            cov = w.stats.n_labelled / w.stats.n_pred
            out.append(
                Decision(
                    w.start,
                    w.end,
                    cov < float(rule["threshold"]),
                    None,
                    cov,
                    None,
                    None,
                    {"threshold": rule["threshold"]},
                )
            )
        else:
            base, base_windows = baseline_for(series, i, rule, fixed_baseline)
            if base is None:
                continue
            d = (
                _drop(rule, w, base, beta)
                if kind == "drop"
                else _shift(rule, w, base, base_windows)
            )
            out.append(d)
    return out


def finite(x: float | None) -> float | None:
    """None for NaN and infinities (JSON has no place for them)."""
    return x if x is not None and math.isfinite(x) else None
