"""Pure rule decisions, one group per rule kind, against values computed outside the project.

Every window here is built from stated counts (no store, no clock): the checks run in well
under a second each.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pytest
from scipy.special import rel_entr
from sklearn.metrics import f1_score, precision_score, recall_score
from statsmodels.stats.multitest import multipletests
from statsmodels.stats.proportion import (
    proportion_confint,
    proportions_ztest,
)

from belated.alerts.decide import Decision, WindowInput, decide, verdicts
from belated.alerts.schemas import RuleCreate, RuleSettings, settings_from
from belated.stats.change import drop_p_value
from belated.stats.droptest import drop_test
from belated.stats.window import WindowStats

DAY0 = datetime(2026, 6, 1, tzinfo=UTC)
DAY = timedelta(days=1)


def rule(**fields: Any) -> RuleSettings:
    """Settings of a rule the API would accept (validated by RuleCreate, defaults filled)."""
    return settings_from(RuleCreate(**fields))


def counts(
    tp: int = 0, fp: int = 0, fn: int = 0, tn: int = 0, *, n_pred: int = 0, n_pred_pos: int = 0
) -> WindowStats:
    """Stats holding only counts: labelled rows are the confusion matrix, plus unlabelled."""
    s = WindowStats.empty()
    s.tp, s.fp, s.fn, s.tn = tp, fp, fn, tn
    s.n_labelled = tp + fp + fn + tn
    s.n_pred = max(n_pred, s.n_labelled)
    s.n_pred_pos = max(n_pred_pos, tp + fp)
    return s


def scored(scores: np.ndarray) -> WindowStats:
    """Stats of unlabelled rows with these scores (predicted positive at 0.5)."""
    return WindowStats.from_rows(scores, scores >= 0.5, [None] * scores.size)


def window(
    i: int,
    stats: WindowStats,
    *,
    settled: bool = True,
    closed: bool = True,
    tags: dict[str, int] | None = None,
) -> WindowInput:
    """Day i of the series."""
    start = DAY0 + i * DAY
    return WindowInput(
        start=start,
        end=start + DAY,
        closed=closed,
        settled=settled,
        stats=stats,
        tag_counts=tags or {},
    )


def arrays(tp: int, fp: int, fn: int, tn: int) -> tuple[np.ndarray, np.ndarray]:
    """(y_true, y_pred) rows with exactly this confusion matrix."""
    y = np.r_[np.ones(tp + fn, int), np.zeros(fp + tn, int)]
    pred = np.r_[np.ones(tp, int), np.zeros(fn, int), np.ones(fp, int), np.zeros(tn, int)]
    return y, pred


# --- floor ------------------------------------------------------------------------------


def test_floor_point_fires_when_the_value_is_under_the_threshold() -> None:
    r = rule(kind="floor", measure="precision", threshold=0.8, min_support=30)
    series = [window(0, counts(tp=70, fp=30, tn=100)), window(1, counts(tp=85, fp=15, tn=100))]
    d0, d1 = decide(r, series, 0)
    for d, (tp, fp) in ((d0, (70, 30)), (d1, (85, 15))):
        # reference: scikit-learn's precision_score on rows with the same confusion matrix
        assert d.value == pytest.approx(precision_score(*arrays(tp, fp, 0, 100)))
    assert d0.breached(r.alpha) and not d1.breached(r.alpha)
    assert d0.baseline == {"threshold": 0.8}


@pytest.mark.parametrize(("n", "fires"), [(50, False), (2000, True)])
def test_floor_confident_fires_only_when_the_upper_bound_is_under(n: int, fires: bool) -> None:
    """Precision 0.74 under a 0.8 floor: small support cannot prove it, large support can."""
    tp = round(0.74 * n)
    point = rule(kind="floor", measure="precision", threshold=0.8, min_support=30)
    sure = rule(kind="floor", measure="precision", threshold=0.8, mode="confident", alpha=0.05)
    series = [window(0, counts(tp=tp, fp=n - tp, tn=100))]
    (p,) = decide(point, series, 0)
    (c,) = decide(sure, series, 0)
    # reference: statsmodels' Wilson interval at 1 - 2 alpha (one-sided bound at 1 - alpha)
    low, high = proportion_confint(tp, n, alpha=2 * sure.alpha, method="wilson")
    assert (c.low, c.high) == (pytest.approx(low), pytest.approx(high))
    assert (high < 0.8) == fires  # the premise of the case
    assert p.breached(point.alpha)
    assert c.breached(sure.alpha) == fires


def test_floor_skips_windows_under_min_support_unsettled_or_open() -> None:
    r = rule(kind="floor", measure="recall", threshold=0.9, min_support=50)
    series = [
        window(0, counts(tp=10, fn=20, tn=500)),  # recall support 30 < 50
        window(1, counts(tp=40, fn=20), settled=False),
        window(2, counts(tp=40, fn=20), closed=False),
        window(3, counts(tp=40, fn=20)),
    ]
    (d,) = decide(r, series, 0)
    assert d.start == DAY0 + 3 * DAY
    # reference: scikit-learn's recall_score
    assert d.value == pytest.approx(recall_score(*arrays(40, 0, 20, 0)))


# --- drop -------------------------------------------------------------------------------


def _drop_series(base: WindowStats, current: WindowStats) -> list[WindowInput]:
    return [window(i, base) for i in range(7)] + [window(7, current)]


@pytest.mark.parametrize(
    ("measure", "base", "current", "tolerance"),
    [
        ("recall", counts(tp=255, fn=45, tn=900), counts(tp=210, fn=90, tn=900), 0.0),
        ("recall", counts(tp=255, fn=45, tn=900), counts(tp=240, fn=60, tn=900), 0.02),
        ("precision", counts(tp=90, fp=10, tn=400), counts(tp=80, fp=20, tn=400), 0.05),
        (
            "positive_rate",
            counts(n_pred=1000, n_pred_pos=300),
            counts(n_pred=1000, n_pred_pos=250),
            0,
        ),
    ],
)
def test_drop_of_a_proportion_takes_the_exact_mid_p_test(
    measure: str, base: WindowStats, current: WindowStats, tolerance: float
) -> None:
    """The drop p-value of a proportion is the exact unconditional mid-p test of
    belated.stats.change (checked there against statsmodels and by simulation), on the
    current window against the pooled 7-day baseline."""
    r = rule(kind="drop", measure=measure, tolerance=tolerance, alpha=0.05, min_support=30)
    (d,) = decide(r, _drop_series(base, current), 7)
    pooled = WindowStats.empty()
    for _ in range(7):
        pooled = pooled.merge(base)
    if measure == "positive_rate":
        x1, n1, x2, n2 = current.n_pred_pos, current.n_pred, pooled.n_pred_pos, pooled.n_pred
    elif measure == "recall":
        x1, n1, x2, n2 = current.tp, current.tp + current.fn, pooled.tp, pooled.tp + pooled.fn
    else:
        x1, n1, x2, n2 = current.tp, current.tp + current.fp, pooled.tp, pooled.tp + pooled.fp
    assert d.value == pytest.approx(x1 / n1)
    assert d.baseline is not None and d.baseline["value"] == pytest.approx(x2 / n2)
    assert d.p_value == pytest.approx(drop_p_value(x1, n1, x2, n2, tolerance))
    assert d.breached(r.alpha) == (x1 / n1 < x2 / n2 - tolerance and d.p_value < r.alpha)


def test_drop_within_tolerance_does_not_fire() -> None:
    base, current = counts(tp=255, fn=45, tn=900), counts(tp=249, fn=51, tn=900)  # 0.85 -> 0.83
    r = rule(kind="drop", measure="recall", tolerance=0.05, alpha=0.05)
    (d,) = decide(r, _drop_series(base, current), 7)
    assert not d.condition and not d.breached(r.alpha)


@pytest.mark.parametrize(
    "cur",
    [(248, 47, 52, 653), (240, 50, 60, 650), (225, 55, 75, 645)],  # F1 0.83, 0.81, 0.78
)
def test_drop_of_f1_takes_the_seeded_null_bootstrap(cur: tuple[int, int, int, int]) -> None:
    """Baseline F1 0.85 over 7 days; the p-value is belated.stats.droptest's seeded
    bootstrap under the null (its level is checked by simulation in tests/stats)."""
    base = (255, 45, 45, 655)
    r = rule(kind="drop", measure="fbeta", tolerance=0.0, alpha=0.05)
    series = _drop_series(counts(*base), counts(*cur))
    (d,) = decide(r, series, 7)
    # reference: scikit-learn's f1_score for the values
    assert d.value == pytest.approx(f1_score(*arrays(*cur)))
    assert d.baseline is not None
    assert d.baseline["value"] == pytest.approx(f1_score(*arrays(*base)))
    pooled = WindowStats.empty()
    for _ in range(7):
        pooled = pooled.merge(counts(*base))
    seed = int(series[-1].start.timestamp()) & 0x7FFFFFFF
    want = drop_test("fbeta", counts(*cur), pooled, tolerance=0.0, beta=1.0, seed=seed)
    assert d.p_value == want.p_value and d.p_value is not None
    assert d.condition
    assert d.breached(r.alpha) == (d.p_value < r.alpha)


def test_a_drop_without_a_p_value_never_breaches() -> None:
    """A tested decision whose p-value is missing is never significant, whatever its
    condition says (DESIGN.md "Rules and alerts")."""
    r = rule(kind="drop", measure="recall", tolerance=0.0, alpha=0.05)
    (d,) = decide(r, _drop_series(counts(tp=255, fn=45, tn=900), counts(tp=150, fn=150)), 7)
    assert d.condition and d.breached(r.alpha)
    missing = replace(d, p_value=None)
    assert missing.condition and not missing.breached(r.alpha)


# --- shift ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("cur_pos", "cur_n", "threshold", "fires"),
    [
        (300, 1000, 0.05, True),  # 0.20 -> 0.30 on 1000: a real, large change
        (6, 20, 0.05, False),  # the same change on 20 predictions: not significant
        (215, 1000, 0.05, False),  # 0.20 -> 0.215: neither significant nor large enough
        (230, 1000, 0.05, False),  # 0.20 -> 0.23: significant (p 0.03) but under 0.05
    ],
)
def test_shift_of_positive_rate_is_the_pooled_two_proportion_test(
    cur_pos: int, cur_n: int, threshold: float, fires: bool
) -> None:
    base = counts(n_pred=1000, n_pred_pos=200)
    r = rule(kind="shift", measure="positive_rate", threshold=threshold, alpha=0.05)
    series = [window(i, base) for i in range(7)] + [
        window(7, counts(n_pred=cur_n, n_pred_pos=cur_pos))
    ]
    (d,) = decide(r, series, 7)
    # reference: statsmodels' proportions_ztest (pooled variance, two-sided)
    _, p_ref = proportions_ztest([cur_pos, 1400], [cur_n, 7000])
    assert d.p_value == pytest.approx(p_ref, rel=1e-9)
    assert d.condition == (abs(cur_pos / cur_n - 0.2) >= threshold)
    assert d.breached(r.alpha) == fires


def _psi(expected: np.ndarray, actual: np.ndarray) -> float:
    """PSI = KL(a || e) + KL(e || a) (common practice), by scipy's rel_entr."""
    return float(np.sum(rel_entr(actual, expected) + rel_entr(expected, actual)))


def test_shift_of_score_psi_on_the_baselines_deciles() -> None:
    """Baseline: 10 scores at the centre of each of the 100 bins, so its deciles are the bin
    edges 0.1, 0.2, ... 0.9; the current window puts known shares in those deciles."""
    centres = (np.arange(100) + 0.5) / 100
    base = scored(np.repeat(centres, 10))
    shares = np.array([0.05, 0.05, 0.05, 0.1, 0.1, 0.1, 0.1, 0.15, 0.15, 0.15])
    current = scored(
        np.concatenate([np.full(int(s * 2000), (k + 0.5) / 10) for k, s in enumerate(shares)])
    )
    r = rule(kind="shift", measure="score_psi", threshold=0.1)
    series = [window(i, base) for i in range(7)] + [window(7, current)]
    (d,) = decide(r, series, 7)
    expected = _psi(np.full(10, 0.1), shares)
    assert d.value == pytest.approx(expected, rel=1e-9)
    assert expected > 0.1 and d.breached(r.alpha)
    (calm,) = decide(rule(kind="shift", measure="score_psi", threshold=0.25), series, 7)
    assert not calm.breached(0.05)


def test_shift_of_tag_psi_pools_the_baseline_windows_tag_counts() -> None:
    base_tags = [{"north": 60, "south": 30, "east": 10}, {"north": 40, "south": 50, "east": 10}]
    now_tags = {"north": 50, "south": 20, "east": 30, "west": 20}
    series = [window(i, counts(n_pred=100), tags=base_tags[i % 2]) for i in range(7)] + [
        window(7, counts(n_pred=120), tags=now_tags)
    ]
    r = rule(kind="shift", measure="tag_psi:region", threshold=0.2, baseline={"windows": 4})
    (d,) = decide(r, series, 7)
    pooled = {"north": 200, "south": 160, "east": 40}  # windows 3..6: two of each pattern
    assert d.baseline is not None and d.baseline["counts"] == pooled
    assert (d.baseline["start"], d.baseline["windows"]) == ("2026-06-04T00:00:00Z", 4)
    keys = ["east", "north", "south", "west"]
    e = np.array([pooled.get(k, 0) for k in keys], float)
    a = np.array([now_tags[k] for k in keys], float)
    # a category missing on one side takes the 1e-4 share floor before renormalising
    e, a = np.maximum(e / e.sum(), 1e-4), a / a.sum()
    expected = _psi(e / e.sum(), a)
    assert d.value == pytest.approx(expected, rel=1e-9)
    assert d.breached(r.alpha) == (expected >= 0.2)


def test_shift_of_tag_psi_against_a_fixed_range_uses_the_range_tag_counts() -> None:
    """A fixed baseline brings its own tag counts (it used to compare with none)."""
    from belated.alerts.decide import pooled_baseline

    reference = [window(i, counts(n_pred=100), tags={"north": 50, "south": 50}) for i in range(3)]
    fixed = pooled_baseline(reference, fixed=True)
    assert fixed is not None and fixed.tag_counts == {"north": 150, "south": 150}
    now_tags = {"north": 90, "south": 10}
    series = [window(10, counts(n_pred=100), tags=now_tags)]
    r = rule(kind="shift", measure="tag_psi:region", threshold=0.2)
    (d,) = decide(r, series, 0, fixed_baseline=fixed)
    # PSI by hand (common practice): sum (a - e) ln(a / e) over the regions, e = 0.5 each
    expected = (0.9 - 0.5) * np.log(0.9 / 0.5) + (0.1 - 0.5) * np.log(0.1 / 0.5)
    assert d.value == pytest.approx(expected, rel=1e-9) and d.breached(r.alpha)
    assert d.baseline is not None and d.baseline["counts"] == {"north": 150, "south": 150}


# --- stall and traffic -------------------------------------------------------------------


def test_stall_judges_coverage_of_windows_older_than_the_label_delay() -> None:
    r = rule(kind="stall", threshold=0.8)
    now = DAY0 + 10 * DAY
    series = [
        window(0, counts(tp=50, tn=20, n_pred=100)),  # coverage 0.70, old
        window(1, counts(tp=60, tn=30, n_pred=100)),  # coverage 0.90, old
        window(2, counts(n_pred=0)),  # nothing predicted: nothing to judge
        window(8, counts(tp=1, n_pred=100)),  # 0.01, but younger than the delay
    ]
    ds = decide(r, series, 0, now=now, label_delay_days=3)
    assert [(d.start, d.value, d.breached(r.alpha)) for d in ds] == [
        (DAY0, pytest.approx(0.7), True),
        (DAY0 + DAY, pytest.approx(0.9), False),
    ]
    assert decide(r, series, 0, now=None) == []


def test_traffic_fires_outside_low_and_high() -> None:
    r = rule(kind="traffic", low=100, high=500)
    series = [window(i, counts(n_pred=n)) for i, n in enumerate([99, 100, 500, 501, 0])]
    ds = decide(r, series, 0)
    assert [(d.value, d.breached(r.alpha)) for d in ds] == [
        (99.0, True),
        (100.0, False),
        (500.0, False),
        (501.0, True),
        (0.0, True),
    ]
    assert ds[0].baseline == {"low": 100.0, "high": 500.0}


# --- Benjamini-Hochberg across segments --------------------------------------------------


def test_verdicts_adjust_the_segments_of_each_window_by_benjamini_hochberg() -> None:
    """Six regions whose positive rate moved from 0.20 by stated amounts, two windows."""
    r = rule(kind="shift", measure="positive_rate", threshold=0.0, alpha=0.05)
    base = counts(n_pred=400, n_pred_pos=80)
    moved = {"a": (0, 0), "b": (16, 4), "c": (22, 10), "d": (26, 18), "e": (40, 25), "f": (8, 30)}
    decisions: dict[str, list[Decision]] = {}
    for seg, (up0, up1) in moved.items():
        series = [window(i, base) for i in range(7)] + [
            window(7, counts(n_pred=400, n_pred_pos=80 + up0)),
            window(8, counts(n_pred=400, n_pred_pos=80 + up1)),
        ]
        decisions[f"region:{seg}"] = decide(r, series, 7)
    got = verdicts(decisions, r.alpha)
    raw_only = 0
    for day in (7, 8):
        start = DAY0 + day * DAY
        segs = sorted(decisions)
        ps = [next(d.p_value for d in decisions[s] if d.start == start) for s in segs]
        # reference: statsmodels' multipletests, Benjamini-Hochberg (Benjamini and Hochberg
        # 1995, JRSS B 57:289-300)
        reject, _, _, _ = multipletests(ps, alpha=r.alpha, method="fdr_bh")
        assert [got[(s, start)] for s in segs] == list(reject)
        raw_only += sum(p < r.alpha for p in ps) - int(reject.sum())
    assert raw_only > 0  # some segment is significant alone but not after the correction


def test_a_lone_p_value_is_not_adjusted_and_a_decision_without_one_rests_on_its_condition() -> None:
    d = Decision(start=DAY0, end=DAY0 + DAY, condition=True, p_value=0.04)
    floor = Decision(start=DAY0, end=DAY0 + DAY, condition=True)
    assert verdicts({"region:a": [d], "region:b": [floor]}, 0.05) == {
        ("region:a", DAY0): True,
        ("region:b", DAY0): True,
    }
    no_test = Decision(start=DAY0, end=DAY0 + DAY, condition=False)
    assert verdicts({"": [no_test]}, 0.05) == {("", DAY0): False}
