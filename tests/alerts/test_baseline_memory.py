"""A baseline that does not forget: an alert stays raised while the measure stays down.

Scenario (stated distributions, as in tests/alerts/scenario.py): each day has 300 actual
positives and 900 negatives, all labelled 6 hours after the prediction; a positive scores
over the 0.5 threshold with probability `recall`. Recall is 0.85 for ten days, then 0.70.
Before this, the trailing baseline took the breached days in and the alert cleared after a
few days while recall stayed at 0.70; now the alert keeps the baseline it was raised on.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import select

from belated.alerts.decide import Baseline, WindowInput, decide
from belated.alerts.evaluate import evaluate_rule
from belated.alerts.schemas import RuleCreate, settings_from
from belated.alerts.tables import Rule, RuleWindow
from belated.stats.window import WindowStats
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.conftest import Tenant
from tests.support import send_both as send
from tests.support.alert_days import day_rows

START = datetime(2026, 11, 1, tzinfo=UTC)
DROP = {
    "kind": "drop",
    "measure": "recall",
    "tolerance": 0.02,
    "alpha": 0.05,
    "min_support": 50,
    "baseline": {"windows": 7},
    "clear_after": 2,
}


def _feed(tenant: Tenant, rng: np.random.Generator, days: range, recall: float) -> None:
    for d in days:
        preds, labels = day_rows(
            rng, START + timedelta(days=d), positives=300, negatives=900, recall=recall, prefix="o"
        )
        send(tenant.client, "returns-v2", preds, labels)


def _evaluate(sessions: Any, rule_id: str, now: datetime) -> None:
    with transaction(sessions) as session:
        rule = session.get(Rule, rule_id)
        assert rule is not None
        evaluate_rule(session, rule, session.get(ModelRow, rule.model_id), now, 100)


def test_a_lasting_recall_drop_keeps_its_alert_raised_on_a_frozen_baseline(
    tenant: Tenant, sessions: Any, frozen: Any
) -> None:
    c = tenant.client
    body = {"name": "returns-v2", "label_delay_days": 2, "min_coverage": 0.9}
    assert c.post("/v1/models", json=body).status_code == 201
    rule = c.post("/v1/models/returns-v2/rules", json=DROP).json()
    rng = np.random.default_rng(11)
    frozen.set(START + timedelta(days=10, hours=12))
    _feed(tenant, rng, range(0, 10), 0.85)
    seen = []
    for day in range(11, 31):  # a day of orders comes in, then the daily evaluation
        now = START + timedelta(days=day, hours=12)
        frozen.set(now)
        _feed(tenant, rng, range(day - 1, day), 0.70)
        _evaluate(sessions, rule["id"], now)
        if day < 13:  # day 10 settles on day 12 (label delay 2 days, all labels in)
            continue
        (alert,) = c.get("/v1/alerts").json()["items"]
        seen.append(alert)
    assert all(a["state"] == "raised" for a in seen), [a["state"] for a in seen]
    assert {a["id"] for a in seen} == {seen[0]["id"]}
    assert {a["started_at"] for a in seen} == {"2026-11-11T00:00:00Z"}
    baselines = {(a["baseline"]["value"], a["baseline"]["start"]) for a in seen}
    assert len(baselines) == 1  # frozen: the same value and period at every evaluation
    ((value, start),) = baselines
    assert 0.82 < value < 0.88 and start == "2026-11-04T00:00:00Z"
    last = seen[-1]
    assert last["latest"]["window_start"] >= "2026-11-27" and last["latest"]["value"] < 0.76
    assert last["latest"]["recovered"] is False
    # breached windows never entered the baseline of a later window
    with transaction(sessions) as session:
        rows = session.scalars(
            select(RuleWindow).where(RuleWindow.rule_id == rule["id"], RuleWindow.breached)
        ).all()
        assert len(rows) >= 15
        assert all(r.baseline and r.baseline["start"] == start for r in rows)
    # recall comes back: two recovered days clear the alert
    for day in range(31, 36):
        now = START + timedelta(days=day, hours=12)
        frozen.set(now)
        _feed(tenant, rng, range(day - 1, day), 0.85)
        _evaluate(sessions, rule["id"], now)
    (alert,) = c.get("/v1/alerts").json()["items"]
    assert alert["state"] == "cleared" and alert["id"] == seen[0]["id"]
    assert alert["cleared_at"] == "2026-12-03T12:00:00Z"  # days 30 and 31 settled on day 33


def test_a_fixed_baseline_that_has_not_settled_decides_nothing_and_says_why(
    tenant: Tenant, sessions: Any, frozen: Any
) -> None:
    c = tenant.client
    body = {"name": "returns-v2", "label_delay_days": 30, "min_coverage": 0.9}
    assert c.post("/v1/models", json=body).status_code == 201
    fixed = {"start": "2026-11-01T00:00:00Z", "end": "2026-11-08T00:00:00Z"}
    rule = c.post("/v1/models/returns-v2/rules", json={**DROP, "baseline": fixed}).json()
    rng = np.random.default_rng(12)
    for d in range(0, 12):  # the baseline week is 40% labelled and younger than 30 days
        preds, labels = day_rows(
            rng,
            START + timedelta(days=d),
            positives=300,
            negatives=900,
            recall=0.85 if d < 7 else 0.70,
            prefix="o",
            label_share=0.4 if d < 7 else 1.0,
        )
        send(c, "returns-v2", preds, labels)
    now = START + timedelta(days=12, hours=12)
    frozen.set(now)
    _evaluate(sessions, rule["id"], now)
    assert c.get("/v1/alerts").json()["items"] == []
    with transaction(sessions) as session:
        rows = session.scalars(
            select(RuleWindow).where(
                RuleWindow.rule_id == rule["id"], RuleWindow.window_start >= START + timedelta(7)
            )
        ).all()
        assert len(rows) == 5  # days 7..11, settled and fully labelled
        for r in rows:
            assert not r.breached and r.recovered is None and r.p_value is None
            assert r.baseline and "not settled yet" in r.baseline["reason"]
            assert "7 of 7 windows" in r.baseline["reason"]


# --- the same property by seeded simulation, on the pure decisions ----------------------

RULE = settings_from(RuleCreate.model_validate({**DROP, "tolerance": 0.0, "clear_after": 1}))


def _day(rng: np.random.Generator, i: int, recall: float) -> WindowInput:
    """One settled day: TP ~ Binomial(300, recall), FP ~ Binomial(900, 0.05)."""
    s = WindowStats.empty()
    s.tp = int(rng.binomial(300, recall))
    s.fn = 300 - s.tp
    s.fp = int(rng.binomial(900, 0.05))
    s.tn = 900 - s.fp
    s.n_pred = s.n_labelled = 1200
    s.n_pred_pos = s.tp + s.fp
    start = START + timedelta(days=i)
    return WindowInput(
        start=start, end=start + timedelta(days=1), closed=True, settled=True, stats=s
    )


def test_simulated_drops_never_clear_while_recall_stays_down() -> None:
    """400 runs of 7 days at recall 0.85 and 20 at 0.70, decided in one pass each. Every run
    breaches within 3 days of the change and, with clear_after 1, no later day is back
    within tolerance of the frozen baseline: P(Binomial(300, 0.70)/300 >= ~0.85) is below
    1e-9 per day (normal approximation, z > 5.9), so 0 of 8,000 days is expected."""
    rng = np.random.default_rng(20261202)
    runs, late, recovered, frozen_values = 400, 0, 0, 0
    for _ in range(runs):
        series = [_day(rng, i, 0.85) for i in range(7)] + [
            _day(rng, 7 + i, 0.70) for i in range(20)
        ]
        ds = decide(RULE, series, 7)
        hits = [i for i, d in enumerate(ds) if d.breached(RULE.alpha)]
        late += not hits or hits[0] > 2
        after = ds[hits[0] :] if hits else []
        recovered += sum(bool(d.recovered) for d in after)
        frozen_values += len({d.baseline["value"] for d in after if d.baseline}) == 1
    print(f"late {late}/{runs}; recovered days {recovered}; frozen in {frozen_values} runs")
    assert late == 0 and recovered == 0 and frozen_values == runs


def _calm_episodes(tolerance: float, runs: int = 300, days: int = 30) -> tuple[float, float]:
    """Alerts that would be raised per day when nothing changes, and the share of days an
    alert is held (compared with a frozen baseline and not back within tolerance)."""
    rule = settings_from(
        RuleCreate.model_validate({**DROP, "tolerance": tolerance, "clear_after": 1})
    )
    rng = np.random.default_rng(7)
    episodes, held = 0, 0
    for _ in range(runs):
        series = [_day(rng, i, 0.85) for i in range(7 + days)]
        for d in decide(rule, series, 7):
            frozen = bool((d.baseline or {}).get("frozen"))
            episodes += d.breached(rule.alpha) and not frozen
            held += frozen and not d.recovered
    return episodes / (runs * days), held / (runs * days)


def test_simulated_calm_days_raise_few_alerts_and_clear_them() -> None:
    """Nothing changes: recall 0.85 throughout, 300 runs of 7 + 30 days (9,000 days), alpha
    0.05. An alert can only be raised on a day not held by an earlier one (clear_after 1).

    With tolerance 0.02 the rate stays under alpha + 3 Monte Carlo standard errors. With
    tolerance 0 it is above alpha: breached days never enter their rule's baseline (the
    contract), and leaving out the lowest days lifts the baseline (measured 6.0% per day;
    5.1% when breached days are kept in). The bound below holds that excess to what was
    measured, so a change that makes it worse fails here. A false alert at tolerance 0 can
    also last: it clears only when a day reaches a baseline that may be high by chance, so
    the share of held days is bounded by what was measured (printed) too."""
    se = math.sqrt(0.05 * 0.95 / 9000)
    rate, held = _calm_episodes(0.02)
    print(f"tolerance 0.02: {rate:.4f} raised per day (bound {0.05 + 3 * se:.4f}); held {held:.4f}")
    assert rate <= 0.05 + 3 * se and held <= 0.01
    rate, held = _calm_episodes(0.0)
    print(f"tolerance 0: {rate:.4f} raised per day; held {held:.4f}")
    assert rate <= 0.06 + 3 * se and held <= 0.13


def test_a_fixed_baseline_with_a_reason_gives_no_decision() -> None:
    rng = np.random.default_rng(1)
    series = [_day(rng, i, 0.70) for i in range(3)]
    waiting = Baseline(
        stats=series[0].stats,
        start=START - timedelta(days=7),
        end=START,
        fixed=True,
        reason="the baseline's 2 of 7 windows are not settled yet",
    )
    ds = decide(RULE, series, 0, fixed_baseline=waiting)
    assert [d.reason for d in ds] == [waiting.reason] * 3
    assert not any(d.condition for d in ds) and all(d.recovered is None for d in ds)
