"""Alert quality by seeded simulation from stated distributions.

Each simulated day has 300 labelled actual positives and 900 negatives. True positives are
Binomial(300, recall), false positives Binomial(900, 0.05). A `drop` rule on recall with
tolerance 0, alpha 0.05 and a trailing baseline of 7 settled windows evaluates each day.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta

import numpy as np

from belated.alerts.decide import WindowInput, decide
from belated.alerts.schemas import RuleCreate, settings_from
from belated.stats.window import WindowStats

DAY0 = datetime(2026, 6, 1, tzinfo=UTC)
RULE = settings_from(
    RuleCreate(
        kind="drop",
        measure="recall",
        tolerance=0.0,
        alpha=0.05,
        min_support=30,
        baseline={"windows": 7},
        mode="point",
    )
)


def _day(rng: np.random.Generator, i: int, recall: float) -> WindowInput:
    s = WindowStats.empty()
    s.tp = int(rng.binomial(300, recall))
    s.fn = 300 - s.tp
    s.fp = int(rng.binomial(900, 0.05))
    s.tn = 900 - s.fp
    s.n_pred = s.n_labelled = 1200
    s.n_pred_pos = s.tp + s.fp
    start = DAY0 + timedelta(days=i)
    return WindowInput(
        start=start, end=start + timedelta(days=1), closed=True, settled=True, stats=s
    )


def test_false_alarm_rate_stays_within_alpha_when_nothing_changes() -> None:
    rng = np.random.default_rng(20261201)
    runs, fired = 1500, 0
    for _ in range(runs):  # independent runs: 7 baseline days and one evaluated day
        series = [_day(rng, i, 0.85) for i in range(8)]
        fired += sum(d.breached(RULE.alpha) for d in decide(RULE, series, 7))
    rate = fired / runs
    se = math.sqrt(RULE.alpha * (1 - RULE.alpha) / runs)
    print(
        f"false alarm rate {rate:.4f} over {runs} windows "
        f"(alpha {RULE.alpha}, 3 SE bound {RULE.alpha + 3 * se:.4f})"
    )
    assert rate <= RULE.alpha + 3 * se


def test_a_fall_from_085_to_070_fires_within_three_settled_windows() -> None:
    rng = np.random.default_rng(7)
    runs, delays = 400, []
    for _ in range(runs):
        series = [_day(rng, i, 0.85) for i in range(7)] + [_day(rng, 7 + i, 0.70) for i in range(3)]
        decisions = decide(RULE, series, 7)
        hits = [i for i, d in enumerate(decisions) if d.breached(RULE.alpha)]
        delays.append(hits[0] + 1 if hits else None)
    caught = [d for d in delays if d is not None]
    print(
        f"caught {len(caught)}/{runs}; windows to fire: "
        f"{ {k: delays.count(k) for k in sorted(set(caught))} }"
    )
    assert len(caught) == runs  # every run fires within the 3 windows after the change


def test_unsettled_windows_are_not_evaluated_by_label_based_rules() -> None:
    rng = np.random.default_rng(3)
    series = [_day(rng, i, 0.85) for i in range(7)] + [_day(rng, 7, 0.30)]
    series[-1].settled = False  # young, labels still coming
    assert decide(RULE, series, 7) == []
