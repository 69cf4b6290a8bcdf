"""Pure decisions: given a rule and a series of windows, which windows breach, and why.

No I/O: the evaluation job loads windows and stores what this module decides. A decision
carries the value, its interval, the baseline and the p-value that made it fire, so an alert
can show its evidence. `condition` holds every part of the verdict except the significance
test; `verdicts` gives the final one, adjusting the p-values of one evaluation across the
segments of a fan-out rule (Benjamini-Hochberg) first.
"""

from __future__ import annotations

import math
from dataclasses import replace
from datetime import datetime

from belated.alerts import catalog, early
from belated.alerts.inputs import Baseline as Baseline
from belated.alerts.inputs import Decision as Decision
from belated.alerts.inputs import Frozen as Frozen
from belated.alerts.inputs import WindowInput as WindowInput
from belated.alerts.inputs import baseline_info
from belated.alerts.schemas import Kind, RuleSettings
from belated.stats.change import benjamini_hochberg, two_proportion_test
from belated.stats.drift import categorical_psi, psi_test
from belated.stats.droptest import drop_test
from belated.stats.summary import summarise
from belated.stats.window import WindowStats


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


def pooled_baseline(
    windows: list[WindowInput], *, fixed: bool = False, reason: str | None = None
) -> Baseline | None:
    """The baseline made of these windows (None when there are none)."""
    if not windows:
        return None
    counts: dict[str, int] = {}
    for w in windows:
        for k, n in w.tag_counts.items():
            counts[k] = counts.get(k, 0) + n
    return Baseline(
        stats=pooled(windows),
        start=windows[0].start,
        end=windows[-1].end,
        parts=tuple(w.start for w in windows),
        tag_counts=counts,
        fixed=fixed,
        reason=reason,
    )


def baseline_for(
    series: list[WindowInput],
    i: int,
    rule: RuleSettings,
    fixed: Baseline | None,
    excluded: set[datetime] | frozenset[datetime] = frozenset(),
) -> Baseline | None:
    """The baseline of series[i]: the fixed range, or the trailing `windows` windows before
    it (settled ones for label-based measures, closed ones otherwise), leaving out the
    windows in `excluded` (breached ones: they never enter their own rule's baseline)."""
    if fixed is not None:
        return fixed
    n = rule.baseline.windows
    label_based = catalog.is_label_based(rule.measure or "")
    picked = [
        w
        for w in series[:i]
        if w.closed and (w.settled or not label_based) and w.start not in excluded
    ][-n:]
    return pooled_baseline(picked)


def _drop(
    rule: RuleSettings, w: WindowInput, basis: Baseline, beta: float, frozen: bool
) -> Decision:
    measure, tol, base = str(rule.measure), rule.tolerance, basis.stats
    value, low, high = measure_value(measure, w.stats, beta, 1 - 2 * rule.alpha)
    base_value, _, _ = measure_value(measure, base, beta, 0.95)
    info = baseline_info(basis, frozen, value=base_value)
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
    # exact mid-p for proportions, DeLong for AUC, a seeded bootstrap under the null for
    # the rest (belated.stats.droptest); None when there is no test, never significant
    seed = int(w.start.timestamp()) & 0x7FFFFFFF
    test = drop_test(measure, w.stats, base, tolerance=tol, beta=beta, seed=seed)
    p = test.p_value
    info.update(drop=(base_value - value), tolerance=tol, test=test.method)
    if test.reason:
        info["no_test"] = test.reason
    return Decision(
        start=w.start,
        end=w.end,
        condition=value < base_value - tol,
        p_value=p,
        value=value,
        low=low,
        high=high,
        baseline=info,
        recovered=value >= base_value - tol,
        tested=True,
    )


def _shift(rule: RuleSettings, w: WindowInput, basis: Baseline, frozen: bool) -> Decision:
    measure, threshold, base = str(rule.measure), rule.threshold, basis.stats
    assert threshold is not None  # check_rule refuses a shift rule without one
    if measure == "positive_rate":
        if w.stats.n_pred == 0 or base.n_pred == 0:
            return Decision(start=w.start, end=w.end, condition=False, reason="no predictions")
        cur_rate, base_rate = w.stats.n_pred_pos / w.stats.n_pred, base.n_pred_pos / base.n_pred
        test = two_proportion_test(w.stats.n_pred_pos, w.stats.n_pred, base.n_pred_pos, base.n_pred)
        moved = abs(cur_rate - base_rate) >= threshold
        return Decision(
            start=w.start,
            end=w.end,
            condition=moved,
            p_value=test.p_two_sided,
            value=cur_rate,
            baseline=baseline_info(basis, frozen, value=base_rate, change=cur_rate - base_rate),
            recovered=not moved,
            tested=True,
        )
    if measure == "score_psi":
        # PSI at or over the threshold, and unlikely under "nothing changed" (small samples
        # cross 0.1 by chance half of the time at 100 predictions)
        seed = int(w.start.timestamp()) & 0x7FFFFFFF
        found = psi_test(base.hist_all, w.stats.hist_all, seed=seed)
        over = found.value.value is not None and found.value.value >= threshold
        return Decision(
            start=w.start,
            end=w.end,
            condition=over,
            p_value=found.p_value,
            value=found.value.value,
            baseline=baseline_info(basis, frozen, predictions=base.n_pred),
            recovered=None if found.value.value is None else not over,
            tested=True,
        )
    v = categorical_psi(basis.tag_counts, w.tag_counts)
    info = baseline_info(basis, frozen, counts=dict(basis.tag_counts))
    over = v.value is not None and v.value >= threshold
    return Decision(
        start=w.start,
        end=w.end,
        condition=over,
        value=v.value,
        baseline=info,
        recovered=None if v.value is None else not over,
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
        # recovery asks the point value itself to be back at the floor, in both modes
        recovered=None if value is None or rule.threshold is None else value >= rule.threshold,
    )


def _traffic(rule: RuleSettings, w: WindowInput) -> Decision:
    n, low, high = w.stats.n_pred, rule.low, rule.high
    outside = (low is not None and n < low) or (high is not None and n > high)
    return Decision(
        start=w.start,
        end=w.end,
        condition=outside,
        value=float(n),
        baseline={"low": low, "high": high},
        recovered=not outside,
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
        recovered=cov >= rule.threshold,
    )


def decide(
    rule: RuleSettings,
    series: list[WindowInput],
    first: int,
    *,
    beta: float = 1.0,
    fixed_baseline: Baseline | None = None,
    frozen: Frozen | None = None,
    excluded: set[datetime] | frozenset[datetime] = frozenset(),
    now: datetime | None = None,
    label_delay_days: float = 30.0,
) -> list[Decision]:
    """Decisions for the eligible windows series[first:] (baselines look further back).

    A baseline does not forget what went wrong. Windows in `excluded` (breached ones of
    earlier evaluations) and windows that breach here never enter the trailing baseline.
    From the first breach on, later windows compare with the baseline that breach was
    decided against, held still (`frozen`, or the active alert's frozen baseline given as
    `frozen`), until `clear_after` windows in a row are back within tolerance of it.

    With `rule.early`, closed unsettled windows whose projection is ready get an early
    decision (`belated.alerts.early`), against the same baseline a settled one would use.
    """
    out: list[Decision] = []
    skip = set(excluded)
    held, run = frozen, 0
    for i in range(first, len(series)):
        w = series[i]
        under = held is not None and w.start >= held.since
        if not eligible(rule.kind, rule.measure, w, rule.min_support):
            # an early look (rule.early) never moves the held baseline or the recovery run:
            # only settled decisions do
            if early.ready(rule, w):
                basis = held.baseline if held is not None and under else None
                if basis is None and rule.kind == "drop":
                    basis = baseline_for(series, i, rule, fixed_baseline, skip)
                out.append(early.look(rule, w, basis, beta, under))
            elif (settled := early.unconfirmed(rule, w)) is not None:
                out.append(settled)
            continue
        d: Decision | None
        if rule.kind == "floor":
            d = _floor(rule, w, beta)
        elif rule.kind == "traffic":
            d = _traffic(rule, w)
        elif rule.kind == "stall":
            d = _stall(rule, w, now, label_delay_days)
        else:
            base = (
                held.baseline
                if held is not None and under
                else baseline_for(series, i, rule, fixed_baseline, skip)
            )
            if base is None:
                d = Decision(
                    start=w.start,
                    end=w.end,
                    condition=False,
                    reason="no settled window before it to compare with"
                    if catalog.is_label_based(rule.measure or "")
                    else "no closed window before it to compare with",
                )
            elif base.reason is not None:
                d = Decision(start=w.start, end=w.end, condition=False, reason=base.reason)
            elif rule.kind == "drop":
                d = replace(_drop(rule, w, base, beta, under), basis=base)
            else:
                d = replace(_shift(rule, w, base, under), basis=base)
        if d is None:
            continue
        out.append(d)
        if d.breached(rule.alpha):
            skip.add(w.start)
            run = 0
            if held is None and d.basis is not None:
                held = Frozen(baseline=d.basis, since=w.start)
        elif under:
            run = run + 1 if d.recovered else 0
            if run >= rule.clear_after:
                held, run = None, 0
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
