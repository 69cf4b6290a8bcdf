"""Early looks, pure: when one is due, what it decides, and that it moves nothing settled.

Windows are built from stated counts (no store, no clock). The drop test on a projected
value is checked against statsmodels' Wald test for two independent proportions
(`statsmodels.stats.proportion.test_proportions_2indep`, method "wald", the unpooled
variance; Agresti and Caffo 2000 describe it as the plain Wald interval's test) in the case
where nothing is left to project: then the early test must be that test.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from statsmodels.stats import proportion

from belated.alerts import catalog, early
from belated.alerts.decide import Baseline, WindowInput, decide, pooled_baseline
from belated.alerts.early import EARLY_SHARE, look, ready, sampling_variance, unconfirmed
from belated.alerts.explain import sentence
from belated.alerts.inputs import Projection
from belated.alerts.schemas import RuleCreate, RuleSettings, settings_from
from belated.stats.window import WindowStats

DAY0 = datetime(2026, 6, 1, tzinfo=UTC)
DAY = timedelta(days=1)


def rule(**fields: Any) -> RuleSettings:
    """Settings of a rule the API would accept."""
    base = {"kind": "drop", "measure": "recall", "early": True, "min_support": 30}
    return settings_from(RuleCreate(**{**base, **fields}))


def counts(tp: int, fp: int, fn: int, tn: int) -> WindowStats:
    s = WindowStats.empty()
    s.tp, s.fp, s.fn, s.tn = tp, fp, fn, tn
    s.n_pred = s.n_labelled = tp + fp + fn + tn
    s.n_pred_pos = tp + fp
    return s


def projection(
    value: float | None,
    final: tuple[float, float, float, float],
    *,
    spread: float = 0.0,
    share: float | None = 0.5,
) -> Projection:
    """A projection of `value` with final counts `final` and a 95% interval of
    value +- spread."""
    return Projection(
        value=value,
        low=None if value is None else value - spread,
        high=None if value is None else value + spread,
        arrived_share=share,
        counts=final,
    )


def settled_day(i: int, stats: WindowStats) -> WindowInput:
    start = DAY0 + i * DAY
    return WindowInput(start=start, end=start + DAY, closed=True, settled=True, stats=stats)


def young_day(i: int, p: Projection | None, *, looked: bool = False) -> WindowInput:
    """A closed, unsettled day: few labels so far, its projection `p`."""
    start = DAY0 + i * DAY
    return WindowInput(
        start=start,
        end=start + DAY,
        closed=True,
        settled=False,
        stats=counts(20, 5, 3, 40),
        projection=p,
        early_look=looked,
    )


def baseline_of(*stats: WindowStats) -> Baseline:
    found = pooled_baseline([settled_day(i, s) for i, s in enumerate(stats)])
    assert found is not None
    return found


@pytest.mark.parametrize(
    "current, base, tolerance",
    [
        ((180, 40, 120, 860), (1785, 280, 315, 6020), 0.0),  # recall 0.60 against 0.85
        ((228, 40, 72, 860), (1785, 280, 315, 6020), 0.0),  # 0.76 against 0.85
        ((240, 40, 60, 860), (1785, 280, 315, 6020), 0.05),  # 0.80 against 0.85, tol 0.05
        ((250, 40, 50, 860), (1785, 280, 315, 6020), 0.0),  # 0.833 against 0.85
        ((60, 10, 40, 90), (700, 100, 300, 900), 0.02),  # 0.60 against 0.70, 100 positives
    ],
)
def test_with_nothing_left_to_project_the_early_test_is_the_wald_test(
    current: tuple[int, int, int, int], base: tuple[int, int, int, int], tolerance: float
) -> None:
    """No spread in the projection (every label in): the early p-value equals statsmodels'
    one-sided Wald test of H0: recall_now - recall_base >= -tolerance, up to the Monte Carlo
    error of the multinomial variances (4,000 draws: about 2% of each variance). In the far
    tail (recall 0.60 against 0.85) both are under pytest.approx's absolute 1e-12."""
    r = rule(tolerance=tolerance)
    tp, fp, fn, tn = current
    w = young_day(8, projection(tp / (tp + fn), (tp, fp, fn, tn)))
    d = look(r, w, baseline_of(counts(*base)), 1.0, False)
    btp, _, bfn, _ = base
    ref = proportion.test_proportions_2indep(
        tp, tp + fn, btp, btp + bfn, value=-tolerance, method="wald", alternative="smaller"
    )
    assert d.early and d.tested and d.p_value is not None
    assert d.p_value == pytest.approx(ref.pvalue, rel=0.08), (d.p_value, ref.pvalue)


def test_the_sampling_variance_of_a_proportion_is_binomial() -> None:
    """Recall's variance over multinomial redraws is r(1 - r) / positives (common practice:
    the binomial variance), within the Monte Carlo error of 4,000 draws."""
    rng = np.random.default_rng(5)
    got = sampling_variance("recall", np.array([255.0, 45.0, 45.0, 855.0]), 1.0, rng)
    assert got == pytest.approx(0.85 * 0.15 / 300, rel=0.06)


def test_the_projection_spread_widens_the_test() -> None:
    """Uncertainty about the labels still to come lowers the evidence: the same drop with a
    projected 95% interval of +-0.08 has a larger p-value than with none."""
    r = rule()
    base = baseline_of(counts(1785, 280, 315, 6020))
    final = (210.0, 40.0, 90.0, 860.0)
    sharp = look(r, young_day(8, projection(0.7, final)), base, 1.0, False)
    loose = look(r, young_day(8, projection(0.7, final, spread=0.08)), base, 1.0, False)
    assert sharp.p_value is not None and loose.p_value is not None
    assert sharp.p_value < 1e-6 < loose.p_value < 0.05
    assert loose.baseline and loose.baseline["projected"] == {
        "low": pytest.approx(0.62),
        "high": pytest.approx(0.78),
        "confidence": 0.95,
    }


@pytest.mark.parametrize(
    "change, due",
    [
        ({}, True),
        ({"share": EARLY_SHARE}, True),
        ({"share": EARLY_SHARE - 0.001}, False),  # under 30% of the expected labels in
        ({"share": None}, False),
        ({"value": None}, False),  # the projection has no value (a class without a curve)
        ({"settled": True}, False),  # a settled window is decided as such
        ({"closed": False}, False),  # the current window
        ({"looked": True}, False),  # one early look per window
        ({"support": 20}, False),  # projected positives under min_support (30)
        ({"rule": {"early": False}}, False),
        ({"rule": {"kind": "floor", "threshold": 0.8}}, True),
    ],
)
def test_when_an_early_look_is_due(change: dict[str, Any], due: bool) -> None:
    positives = change.get("support", 300)
    final = (0.8 * positives, 40.0, 0.2 * positives, 860.0)
    value = change.get("value", 0.8)
    p = projection(value, final, spread=0.02, share=change.get("share", 0.5))
    w = young_day(8, p, looked=change.get("looked", False))
    w.settled = change.get("settled", False)
    w.closed = change.get("closed", True)
    assert ready(rule(**change.get("rule", {})), w) is due


def test_decide_looks_early_at_unsettled_windows_and_settled_windows_as_before() -> None:
    rng = np.random.default_rng(11)
    stable = [settled_day(i, _day(rng, 0.85)) for i in range(7)]
    r = rule(tolerance=0.02)
    final = (180.0, 45.0, 120.0, 855.0)
    series = [*stable, young_day(7, projection(0.6, final, spread=0.05))]
    (d,) = decide(r, series, 7)
    assert d.early and d.breached(r.alpha) and d.recovered is None
    assert d.baseline and d.baseline["start"] == DAY0.isoformat().replace("+00:00", "Z")
    assert d.baseline["early"] is True and d.baseline["arrived_share"] == 0.5
    assert d.basis is not None and d.basis.parts == tuple(w.start for w in stable)
    # the same window once settled: decided on its counts, not early
    series[-1] = settled_day(7, counts(180, 45, 120, 855))
    (d,) = decide(r, series, 7)
    assert not d.early and d.breached(r.alpha) and d.baseline and d.baseline["test"] == "mid-p"
    # looked at already and still unsettled: nothing new is decided on it
    assert decide(r, [*stable, young_day(7, None, looked=True)], 7) == []


def _day(rng: np.random.Generator, recall: float) -> WindowStats:
    """A settled day: TP ~ Binomial(300, recall), FP ~ Binomial(900, 0.05)."""
    tp, fp = int(rng.binomial(300, recall)), int(rng.binomial(900, 0.05))
    return counts(tp, fp, 300 - tp, 900 - fp)


def test_early_looks_never_change_a_settled_decision() -> None:
    """50 seeded series of 7 stable days, then days that fall to recall 0.70 and recover,
    with unsettled days (some breaching early) mixed in among the settled ones: every
    settled decision is the same with and without the early looks."""
    r = rule(tolerance=0.02, clear_after=2)
    rng = np.random.default_rng(2026)
    for _ in range(50):
        days = [settled_day(i, _day(rng, 0.85)) for i in range(7)]
        for i, recall in enumerate([0.70, 0.70, 0.85, 0.85, 0.85, 0.70, 0.85], start=7):
            days.append(settled_day(i, _day(rng, recall)))
        for i in (8, 11, 13):  # unsettled: labels of these days are still coming
            value = float(rng.uniform(0.55, 0.9))
            final = (300 * value, 45.0, 300 * (1 - value), 855.0)
            days[i] = young_day(i, projection(value, final, spread=0.04))
        with_early = decide(r, days, 7)
        without = decide(replace(r, early=False), days, 7)
        assert [d for d in with_early if not d.early] == without
        assert {d.start for d in with_early if d.early} == {days[i].start for i in (8, 11, 13)}


def test_an_early_floor_reads_the_projected_value_or_its_upper_bound() -> None:
    final = (222.0, 45.0, 78.0, 855.0)
    w = young_day(8, projection(0.74, final, spread=0.03))
    point = look(rule(kind="floor", threshold=0.75), w, None, 1.0, False)
    assert point.early and point.breached(0.05) and point.high is not None
    assert point.low is not None and point.low < 0.74 < point.high < 0.8
    confident = look(rule(kind="floor", threshold=0.75, mode="confident"), w, None, 1.0, False)
    assert not confident.breached(0.05)  # 0.75 is within reach of the projected value
    assert look(rule(kind="floor", threshold=0.8, mode="confident"), w, None, 1.0, False).condition


def test_an_early_drop_without_a_settled_baseline_decides_nothing_and_says_why() -> None:
    w = young_day(0, projection(0.6, (180.0, 45.0, 120.0, 855.0)))
    (d,) = decide(rule(), [w], 0)
    assert d.early and not d.condition and d.reason and "no settled window" in d.reason


def test_a_looked_window_that_settles_without_support_is_not_confirmed() -> None:
    start = DAY0 + 8 * DAY
    w = WindowInput(
        start=start, end=start + DAY, closed=True, settled=True, stats=counts(10, 2, 5, 40)
    )
    assert unconfirmed(rule(), w) is None  # no early look on record
    w.early_look = True
    d = unconfirmed(rule(), w)
    assert d is not None and not d.condition and not d.early and d.reason
    assert "fewer than 30" in d.reason
    (got,) = decide(rule(), [settled_day(i, counts(255, 45, 45, 855)) for i in range(7)] + [w], 7)
    assert got == d


def test_early_is_only_for_rules_with_labels_still_to_come() -> None:
    assert catalog.check_early("drop", "recall") is None
    assert catalog.check_early("floor", "npv") is None
    for kind in ("traffic", "stall", "shift"):
        assert "no labels to wait for" in str(catalog.check_early(kind, None))
    assert "needs no labels" in str(catalog.check_early("drop", "implied.precision"))
    assert "needs no labels" in str(catalog.check_early("drop", "positive_rate"))
    for measure in ("mcc", "balanced_accuracy", "roc_auc", "average_precision"):
        assert "no projected value" in str(catalog.check_early("drop", measure))
    assert set(catalog.PROJECTED_MEASURES) == {
        "precision",
        "recall",
        "fbeta",
        "accuracy",
        "specificity",
        "npv",
        "prevalence",
    }


def test_an_early_alert_says_so_in_its_sentence() -> None:
    r = rule(tolerance=0.05)
    base = {"value": 0.85, "start": "2026-11-01T00:00:00Z", "end": "2026-11-08T00:00:00Z"}
    said = sentence(r, base, "region:north", early=True)
    assert said == (
        "Recall fell more than 0.05 under its baseline of 0.85 (1–7 Nov), at α = 0.05, "
        "in region north: early warning from projected values."
    )
    assert sentence(r, base, "region:north") == said.replace(
        ": early warning from projected values.", "."
    )


def test_a_projection_without_counts_or_values_is_read_as_none() -> None:
    assert early.projection_of("recall", None) is None
    answer = {
        "projected": {"recall": {"value": None, "low": None, "high": None, "reason": "why"}},
        "arrived_share": 0.4,
        "counts": None,
    }
    p = early.projection_of("recall", answer)
    assert p is not None and p.value is None and p.reason == "why" and p.counts is None
    assert not ready(rule(), young_day(3, p))
