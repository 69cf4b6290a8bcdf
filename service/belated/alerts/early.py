"""Early looks: a rule with `early: true` decided on an unsettled window's projected measure.

A label-based rule decides on settled windows. With `early: true` it also looks, once per
window, at a closed window that has not settled yet, through its projected measure
(`belated.stats.projection`), as soon as at least `EARLY_SHARE` of the window's expected
labels have arrived and the projection has a value. What the look finds is marked early;
a settled decision on the same window replaces it (DESIGN.md, "Late labels").

One look per window, not one per evaluation: re-deciding a window each time its labels grow
would give a stable model many chances to breach by chance (the settled decisions are made
once per window for the same reason). The look is the first evaluation that finds the
window ready; until it settles the window is not looked at again.

The drop test on a projected value. With v the projected value and b the baseline's,

    z = (v - b + tolerance) / sqrt(s_proj^2 + s_final^2 + s_base^2),   p = Phi(z)   (one-sided)

- s_proj: the projection's own uncertainty, from its interval: (high - low) / (2 z_c) for
  the central `confidence` interval. It covers the correction (curves, share of positives)
  and the labels still to come, i.e. how far the window's final value may lie from v.
- s_final: how far a window's final value lies from the rate of the process that made it,
  the sampling error the settled test accounts for: the variance of the measure over
  multinomial redraws of the projected final confusion counts (seeded).
- s_base: the same for the baseline's pooled counts.

The first two add up because v is the expected final value given what has arrived, so
(v - final) and (final - process) are uncorrelated; for recall with a share F of the
positives arrived, s_proj^2 + s_final^2 comes to r(1 - r) / (F P), the variance of the
recall of the arrived positives. The normal approximation is used where the settled test
is exact: the false-alarm rate this gives on a stable model is measured by simulation
(tests/alerts/test_early_simulation.py) and stated in the README. A floor looks at the
projected value (`point`) or at v + z_(1-alpha) sqrt(s_proj^2 + s_final^2) (`confident`).
"""

from __future__ import annotations

import math
from statistics import NormalDist
from typing import Any

import numpy as np

from belated.alerts import catalog
from belated.alerts.inputs import Baseline, Decision, Projection, WindowInput, baseline_info
from belated.alerts.schemas import RuleSettings
from belated.stats.projection import measure_values

EARLY_SHARE = 0.3  # share of a window's expected labels arrived before an early look
PROJECTED_CONFIDENCE = 0.95  # the projected interval an early look reads
SAMPLING_DRAWS = 4000  # multinomial redraws for the sampling variance of a measure
METHOD = "projected-normal"
CELLS = ("tp", "fp", "fn", "tn")
_NORMAL = NormalDist()


def projection_of(measure: str, answer: dict[str, Any] | None) -> Projection | None:
    """The rule's measure out of a window's projection (`metrics.arrival.projected`)."""
    if not answer:
        return None
    block = (answer.get("projected") or {}).get(measure) or {}
    counts = answer.get("counts")
    return Projection(
        value=block.get("value"),
        low=block.get("low"),
        high=block.get("high"),
        reason=block.get("reason"),
        arrived_share=answer.get("arrived_share"),
        counts=None
        if counts is None
        else (float(counts["tp"]), float(counts["fp"]), float(counts["fn"]), float(counts["tn"])),
        confidence=PROJECTED_CONFIDENCE,
    )


def ready(rule: RuleSettings, w: WindowInput) -> bool:
    """Whether an early look is due on this window: the rule asks for one, the window is
    closed and unsettled, not looked at before, at least `EARLY_SHARE` of its expected
    labels are in, and the projection has a value, an interval and enough support."""
    p = w.projection
    if not rule.early or not w.closed or w.settled or w.early_look or p is None:
        return False
    if p.arrived_share is None or p.arrived_share < EARLY_SHARE:
        return False
    if p.value is None or p.low is None or p.high is None or p.counts is None:
        return False
    counts = dict(zip(CELLS, p.counts, strict=True))
    return sum(counts[k] for k in catalog.DENOMINATORS.get(rule.measure or "", ())) >= max(
        rule.min_support, 1
    )


def unconfirmed(rule: RuleSettings, w: WindowInput) -> Decision | None:
    """The settled word on a window looked at early that settled without a decision of its
    own (too few items in the measure's denominator): the early look is not confirmed."""
    if not (rule.early and w.early_look and w.settled and w.closed):
        return None
    return Decision(
        start=w.start,
        end=w.end,
        condition=False,
        reason=(
            f"settled with fewer than {rule.min_support} items in the measure's denominator: "
            "no settled decision, so the early look is not confirmed"
        ),
    )


def sampling_variance(
    measure: str, counts: np.ndarray, beta: float, rng: np.random.Generator
) -> float | None:
    """The variance of a measure over multinomial redraws of (tp, fp, fn, tn) counts of the
    same total: how far a window's value strays from the rate of the process behind it."""
    total = float(counts.sum())
    n = int(round(total))
    if n <= 0:
        return None
    draws = rng.multinomial(n, counts / total, size=SAMPLING_DRAWS).astype(np.float64)
    values = measure_values(draws, beta)[measure]
    finite = values[np.isfinite(values)]
    return float(np.var(finite, ddof=1)) if finite.size > 1 else None


def _spread(p: Projection) -> float:
    """The projection's standard error, from its central interval."""
    assert p.low is not None and p.high is not None
    return (p.high - p.low) / (2.0 * _NORMAL.inv_cdf(0.5 + p.confidence / 2.0))


def _window_se(rule: RuleSettings, p: Projection, beta: float, rng: np.random.Generator) -> float:
    """The standard error of the projected value as an estimate of the process's rate."""
    assert p.counts is not None
    final = sampling_variance(str(rule.measure), np.asarray(p.counts), beta, rng)
    return math.sqrt(_spread(p) ** 2 + (final or 0.0))


def _lower_tail(z: float) -> float:
    """Phi(z), exact in the far tail too (where 1 + erf(z / sqrt 2) loses every digit)."""
    return 0.5 * math.erfc(-z / math.sqrt(2.0))


def _rng(w: WindowInput) -> np.random.Generator:
    return np.random.default_rng([int(w.start.timestamp()) & 0x7FFFFFFF, 0xEA])


def _marks(p: Projection) -> dict[str, Any]:
    """What an early decision records about the projection it read."""
    return {
        "early": True,
        "arrived_share": p.arrived_share,
        "projected": {"low": p.low, "high": p.high, "confidence": p.confidence},
    }


def look(
    rule: RuleSettings, w: WindowInput, basis: Baseline | None, beta: float, frozen: bool
) -> Decision:
    """The early decision on a window that is `ready`: floor or drop on its projection."""
    p = w.projection
    assert p is not None and p.value is not None
    rng = _rng(w)
    if rule.kind == "floor":
        half = _NORMAL.inv_cdf(1.0 - rule.alpha) * _window_se(rule, p, beta, rng)
        value, low, high = p.value, p.value - half, p.value + half
        probe = high if rule.mode == "confident" else value
        threshold = rule.threshold
        return Decision(
            start=w.start,
            end=w.end,
            condition=threshold is not None and probe < threshold,
            value=value,
            low=low,
            high=high,
            baseline={"threshold": threshold, **_marks(p)},
            early=True,
        )
    if basis is None or basis.reason is not None:
        why = "no settled window before it to compare with" if basis is None else basis.reason
        return Decision(start=w.start, end=w.end, condition=False, reason=why, early=True)
    return _drop(rule, w, p, basis, beta, frozen, rng) or Decision(
        start=w.start,
        end=w.end,
        condition=False,
        reason=f"{rule.measure} is undefined in the baseline",
        early=True,
    )


def _drop(
    rule: RuleSettings,
    w: WindowInput,
    p: Projection,
    basis: Baseline,
    beta: float,
    frozen: bool,
    rng: np.random.Generator,
) -> Decision | None:
    measure, tol = str(rule.measure), rule.tolerance
    assert p.value is not None
    b = basis.stats
    base_counts = np.array([b.tp, b.fp, b.fn, b.tn], dtype=np.float64)
    base_value = float(measure_values(base_counts, beta)[measure])
    if math.isnan(base_value):
        return None
    window_se = _window_se(rule, p, beta, rng)
    base_var = sampling_variance(measure, base_counts, beta, rng) or 0.0
    se = math.sqrt(window_se**2 + base_var)
    # no spread at all (every count at a bound): no test, and a missing p-value never fires
    p_value = _lower_tail((p.value - base_value + tol) / se) if se > 0 else None
    half = _NORMAL.inv_cdf(1.0 - rule.alpha) * window_se
    info = baseline_info(basis, frozen, value=base_value, drop=base_value - p.value)
    info.update(tolerance=tol, test=METHOD, standard_error=se, **_marks(p))
    return Decision(
        start=w.start,
        end=w.end,
        condition=p.value < base_value - tol,
        p_value=p_value,
        value=p.value,
        low=p.value - half,
        high=p.value + half,
        baseline=info,
        basis=basis,
        tested=True,
        early=True,
    )
