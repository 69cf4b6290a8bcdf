"""Pure decisions: given a rule and a series of windows, which windows breach, and why.

No I/O: the evaluation job loads windows and stores what this module decides. A decision
carries the value, its interval, the baseline and the p-value that made it fire, so an alert
can show its evidence. `condition` holds every part of the verdict except the significance
test; `verdicts` gives the final one, adjusting the p-values of one evaluation across the
segments of a fan-out rule (Benjamini-Hochberg) first.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from belated.alerts import catalog, pvalues
from belated.alerts.schemas import Kind, RuleSettings
from belated.stats.change import benjamini_hochberg, two_proportion_test
from belated.stats.drift import categorical_psi, psi
from belated.stats.summary import summarise
from belated.stats.window import WindowStats


@dataclass(kw_only=True)
class WindowInput:
    """One window of one segment as a rule sees it."""

    start: datetime
    end: datetime
    closed: bool
    settled: bool
    stats: WindowStats
    tag_counts: dict[str, int] = field(default_factory=dict)


@dataclass(frozen=True, kw_only=True)
class Decision:
    """The verdict on one window."""

    start: datetime
    end: datetime
    condition: bool
    p_value: float | None = None
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
    """A measure's value and interval in one window (the implied block for implied.*)."""
    if measure.startswith(catalog.IMPLIED_PREFIX):
        est = summarise(s, beta=beta, measures={"precision"}, resamples=1)["implied"]
        value = est.get(measure.removeprefix(catalog.IMPLIED_PREFIX), {}).get("value")
        return value, None, None
    out = summarise(s, beta=beta, confidence=confidence, measures={measure})["measures"][measure]
    return out["value"], out["low"], out["high"]


def eligible(rule_kind: Kind, measure: str | None, w: WindowInput, min_support: int) -> bool:
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
    series: list[WindowInput], i: int, rule: RuleSettings, fixed: WindowStats | None
) -> tuple[WindowStats | None, list[WindowInput]]:
    """The trailing baseline windows before series[i] (or the fixed range's stats)."""
    if fixed is not None:
        return fixed, []
    n = rule.baseline.windows
    label_based = catalog.is_label_based(rule.measure or "")
    picked = [w for w in series[:i] if w.closed and (w.settled or not label_based)][-n:]
    return (pooled(picked) if picked else None), picked


def _drop(rule: RuleSettings, w: WindowInput, base: WindowStats, beta: float) -> Decision:
    measure, tol = str(rule.measure), rule.tolerance
    value, low, high = measure_value(measure, w.stats, beta, 1 - 2 * rule.alpha)
    base_value, _, _ = measure_value(measure, base, beta, 0.95)
    info: dict[str, Any] = {"value": base_value}
    if value is None or base_value is None:
        return Decision(
            start=w.start,
            end=w.end,
            condition=False,
            value=value,
            low=low,
            high=high,
            baseline=info,
        )
    p: float | None
    parts = catalog.PROPORTIONS.get(measure)
    if measure == "positive_rate":
        p = pvalues.drop_proportion(
            w.stats.n_pred_pos, w.stats.n_pred, base.n_pred_pos, base.n_pred, tol
        )
    elif parts is not None:
        cur_c, base_c = _confusion(w.stats), _confusion(base)
        x1, n1 = sum(cur_c[k] for k in parts[0]), sum(cur_c[k] for k in parts[1])
        x2, n2 = sum(base_c[k] for k in parts[0]), sum(base_c[k] for k in parts[1])
        p = pvalues.drop_proportion(x1, n1, x2, n2, tol)
    else:
        seed = int(w.start.timestamp()) & 0x7FFFFFFF
        p = pvalues.drop_bootstrap(measure, w.stats, base, beta, tol, seed)
    info.update(drop=(base_value - value), tolerance=tol)
    return Decision(
        start=w.start,
        end=w.end,
        condition=value < base_value - tol,
        p_value=p,
        value=value,
        low=low,
        high=high,
        baseline=info,
    )


def _shift(
    rule: RuleSettings, w: WindowInput, base: WindowStats, base_windows: list[WindowInput]
) -> Decision:
    measure, threshold = str(rule.measure), rule.threshold
    assert threshold is not None  # check_rule refuses a shift rule without one
    if measure == "positive_rate":
        if w.stats.n_pred == 0 or base.n_pred == 0:
            return Decision(start=w.start, end=w.end, condition=False)
        cur_rate, base_rate = w.stats.n_pred_pos / w.stats.n_pred, base.n_pred_pos / base.n_pred
        test = two_proportion_test(w.stats.n_pred_pos, w.stats.n_pred, base.n_pred_pos, base.n_pred)
        return Decision(
            start=w.start,
            end=w.end,
            condition=abs(cur_rate - base_rate) >= threshold,
            p_value=test.p_two_sided,
            value=cur_rate,
            baseline={"value": base_rate, "change": cur_rate - base_rate},
        )
    if measure == "score_psi":
        v = psi(base.hist_all, w.stats.hist_all)
        return Decision(
            start=w.start,
            end=w.end,
            condition=v.value is not None and v.value >= threshold,
            value=v.value,
            baseline={"predictions": base.n_pred},
        )
    base_counts: dict[str, int] = {}
    for b in base_windows:
        for k, n in b.tag_counts.items():
            base_counts[k] = base_counts.get(k, 0) + n
    v = categorical_psi(base_counts, w.tag_counts)
    return Decision(
        start=w.start,
        end=w.end,
        condition=v.value is not None and v.value >= threshold,
        value=v.value,
        baseline={"counts": base_counts},
    )


def _floor(rule: RuleSettings, w: WindowInput, beta: float) -> Decision:
    confident = rule.mode == "confident"
    conf = 1 - 2 * rule.alpha if confident else 0.95
    value, low, high = measure_value(str(rule.measure), w.stats, beta, conf)
    probe = high if confident else value
    return Decision(
        start=w.start,
        end=w.end,
        condition=probe is not None and rule.threshold is not None and probe < rule.threshold,
        value=value,
        low=low,
        high=high,
        baseline={"threshold": rule.threshold},
    )


def _volume(rule: RuleSettings, w: WindowInput) -> Decision:
    n, low, high = w.stats.n_pred, rule.low, rule.high
    return Decision(
        start=w.start,
        end=w.end,
        condition=(low is not None and n < low) or (high is not None and n > high),
        value=float(n),
        baseline={"low": low, "high": high},
    )


def _stall(
    rule: RuleSettings, w: WindowInput, now: datetime | None, label_delay_days: float
) -> Decision | None:
    if rule.threshold is None or now is None:
        return None
    old = (now - w.end).total_seconds() > label_delay_days * 86400
    if not old or w.stats.n_pred == 0:
        return None
    cov = w.stats.n_labelled / w.stats.n_pred
    return Decision(
        start=w.start,
        end=w.end,
        condition=cov < rule.threshold,
        value=cov,
        baseline={"threshold": rule.threshold},
    )


def decide(
    rule: RuleSettings,
    series: list[WindowInput],
    first: int,
    *,
    beta: float = 1.0,
    fixed_baseline: WindowStats | None = None,
    now: datetime | None = None,
    label_delay_days: float = 30.0,
) -> list[Decision]:
    """Decisions for the eligible windows series[first:] (baselines look further back)."""
    out: list[Decision] = []
    for i in range(first, len(series)):
        w = series[i]
        if not eligible(rule.kind, rule.measure, w, rule.min_support):
            continue
        d: Decision | None
        if rule.kind == "floor":
            d = _floor(rule, w, beta)
        elif rule.kind == "volume":
            d = _volume(rule, w)
        elif rule.kind == "stall":
            d = _stall(rule, w, now, label_delay_days)
        else:
            base, base_windows = baseline_for(series, i, rule, fixed_baseline)
            if base is None:
                continue
            d = (
                _drop(rule, w, base, beta)
                if rule.kind == "drop"
                else _shift(rule, w, base, base_windows)
            )
        if d is not None:
            out.append(d)
    return out


def verdicts(
    decisions: dict[str, list[Decision]], alpha: float
) -> dict[tuple[str, datetime], bool]:
    """Final verdicts by (segment, window start), with Benjamini-Hochberg at `alpha` across
    the segments of each window when more than one of them has a p-value."""
    by_window: dict[datetime, list[tuple[str, Decision]]] = {}
    for seg, ds in decisions.items():
        for d in ds:
            by_window.setdefault(d.start, []).append((seg, d))
    out: dict[tuple[str, datetime], bool] = {}
    for start, items in by_window.items():
        with_p = [(s, d.p_value) for s, d in items if d.p_value is not None]
        adjusted: dict[str, float] = {}
        if len(with_p) > 1:
            adj, _ = benjamini_hochberg([p for _, p in with_p], q=alpha)
            adjusted = {s: a for (s, _), a in zip(with_p, adj, strict=True)}
        for s, d in items:
            out[(s, start)] = d.breached(alpha, adjusted.get(s))
    return out


def finite(x: float | None) -> float | None:
    """None for NaN and infinities (JSON has no place for them)."""
    return x if x is not None and math.isfinite(x) else None
