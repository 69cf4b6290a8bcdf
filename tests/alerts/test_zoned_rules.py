"""Rules of a zoned model decide on the model's local days and weeks, the /metrics windows.

Every window is checked against the standard library's `zoneinfo` (its reading of the IANA
tz database) and against GET /metrics of the same model. The 2026 changes: Europe/Berlin on
29 March and 25 October (Directive 2000/84/EC: the last Sundays of March and October, at
01:00 UTC), America/Chicago on 8 March and 1 November (Energy Policy Act of 2005, sec. 110:
the second Sunday of March and the first Sunday of November, at 02:00 local), so each zone
has a local day of 23 hours and one of 25.

Data (seeded, stated here): for the local days from 5 days before each change to 3 days
after it, 240 predictions uniform over the local day plus 40 in its first five local hours
(where a UTC day boundary would cut); uniform scores. Each prediction is tagged region north
with probability 0.2 before the day before the change and 0.8 from then on (south
otherwise).
"""

from __future__ import annotations

from collections import Counter
from datetime import UTC, date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pytest

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.tables import Rule
from belated.clock import clock
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.conftest import Tenant
from tests.support import post_model, send

CHANGES = {
    "Europe/Berlin": (date(2026, 3, 29), date(2026, 10, 25)),
    "America/Chicago": (date(2026, 3, 8), date(2026, 11, 1)),
}
BEFORE, AFTER = 5, 4  # local days sent: change - BEFORE up to (not including) change + AFTER
MODEL = "returns-zoned"


def _midnight(day: date, tz: ZoneInfo) -> datetime:
    """The UTC instant of local midnight (neither zone changes its clocks at midnight)."""
    return datetime.combine(day, time(0), tzinfo=tz).astimezone(UTC)


def _days(change: date) -> list[date]:
    return [change + timedelta(days=k) for k in range(-BEFORE, AFTER)]


def _feed(tenant: Tenant, name: str, seed: int) -> list[tuple[datetime, str]]:
    """Send the stated predictions; return (time, region) of each."""
    tz = ZoneInfo(name)
    rng = np.random.default_rng(seed)
    sent: list[tuple[datetime, str]] = []
    items = []
    for change in CHANGES[name]:
        for day in _days(change):
            lo, hi = _midnight(day, tz), _midnight(day + timedelta(days=1), tz)
            span = (hi - lo).total_seconds()
            offsets = np.r_[rng.uniform(0, span, 240), rng.uniform(0, 5 * 3600, 40)]
            north = 0.8 if day >= change - timedelta(days=1) else 0.2
            for off in offsets:
                at = lo + timedelta(seconds=float(off))
                region = "north" if rng.random() < north else "south"
                sent.append((at, region))
                items.append(
                    {
                        "id": f"order-{len(items)}",
                        "ts": at.isoformat(),
                        "score": float(rng.random()),
                        "tags": {"region": region},
                    }
                )
    send(tenant.client, MODEL, "predictions", items)
    return sent


def _evaluate(sessions: Any, rule_ids: list[str], now: datetime) -> None:
    with transaction(sessions) as session:
        for rule_id in rule_ids:
            rule = session.get(Rule, rule_id)
            assert rule is not None
            evaluate_rule(session, rule, session.get(ModelRow, rule.model_id), now, 100)


def _breaches(tenant: Tenant, rule_id: str) -> list[dict[str, Any]]:
    items = tenant.client.get("/v1/alerts", params={"model": MODEL, "limit": 500}).json()["items"]
    found = [b for a in items if a["rule_id"] == rule_id for b in a["breaches"] if b["breached"]]
    return sorted(found, key=lambda b: b["window_start"])


def _instant(text: str) -> datetime:
    return datetime.fromisoformat(text).astimezone(UTC)


def _metrics(tenant: Tenant, **params: Any) -> list[dict[str, Any]]:
    r = tenant.client.get(f"/v1/models/{MODEL}/metrics", params=params)
    assert r.status_code == 200, r.text
    return list(r.json()["windows"])


@pytest.mark.parametrize("name", sorted(CHANGES))
def test_rules_decide_on_local_days_and_weeks_equal_to_the_metrics_windows(
    tenant: Tenant, sessions: Any, name: str
) -> None:
    tz = ZoneInfo(name)
    spring, fall = CHANGES[name]
    post_model(tenant.client, MODEL, label_delay_days=2, time_zone=name, segment_keys=["region"])
    sent = _feed(tenant, name, seed=20261203 + len(name))
    # a baseline given as bare dates is the model's local days: 5 days before the spring
    # change up to (not including) 2 days before it
    base_first, base_end = spring - timedelta(days=5), spring - timedelta(days=2)
    bodies = {
        "day": {"kind": "traffic", "low": 1e9},  # every closed window breaches, value = count
        "week": {"kind": "traffic", "low": 1e9, "granularity": "week"},
        "mix": {
            "kind": "shift",
            "measure": "tag_psi:region",
            "threshold": 0.25,
            "baseline": {"start": base_first.isoformat(), "end": base_end.isoformat()},
        },
    }
    ids = {}
    for key, body in bodies.items():
        r = tenant.client.post(f"/v1/models/{MODEL}/rules", json=body)
        assert r.status_code == 201, r.text
        ids[key] = r.json()["id"]
    stored = tenant.client.get(f"/v1/models/{MODEL}/rules/{ids['mix']}").json()["baseline"]
    assert _instant(stored["start"]) == _midnight(base_first, tz)
    assert _instant(stored["end"]) == _midnight(base_end, tz)

    per_day = Counter(at.astimezone(tz).date() for at, _ in sent)
    for change in (spring, fall):
        # evaluated at noon, local, four days after the change: every sent day is closed
        now = _midnight(change + timedelta(days=AFTER), tz) + timedelta(hours=12)
        clock.set(now)  # the API's "closed" as the evaluation saw it
        _evaluate(sessions, list(ids.values()), now)
        days = _days(change)
        lo, hi = _midnight(days[0], tz), _midnight(days[-1] + timedelta(days=1), tz)

        # day windows: local midnights by zoneinfo, 23 and 25 hours at the changes
        daily = [b for b in _breaches(tenant, ids["day"]) if lo <= _instant(b["window_start"]) < hi]
        assert [(_instant(b["window_start"]), _instant(b["window_end"])) for b in daily] == [
            (_midnight(d, tz), _midnight(d + timedelta(days=1), tz)) for d in days
        ]
        hours = {
            d: (_instant(b["window_end"]) - _instant(b["window_start"])) / timedelta(hours=1)
            for d, b in zip(days, daily, strict=True)
        }
        assert hours[change] == (23 if change == spring else 25)
        assert {h for d, h in hours.items() if d != change} == {24}
        assert [b["value"] for b in daily] == [per_day[d] for d in days]
        # ... and the same windows as GET /metrics (bare dates are local days there too)
        windows = _metrics(
            tenant, start=days[0].isoformat(), end=(days[-1] + timedelta(days=1)).isoformat()
        )
        assert [(_instant(w["start"]), _instant(w["end"])) for w in windows] == [
            (_instant(b["window_start"]), _instant(b["window_end"])) for b in daily
        ]
        assert [w["predictions"] for w in windows] == [b["value"] for b in daily]

        # week windows: Monday local midnight; the week of the change lasts 167 or 169 hours
        monday = days[0] - timedelta(days=days[0].weekday())
        weeks = _metrics(
            tenant,
            granularity="week",
            start=monday.isoformat(),
            end=(days[-1] + timedelta(days=7)).isoformat(),
        )
        weekly = {b["window_start"]: b for b in _breaches(tenant, ids["week"])}
        closed = [w for w in weeks if w["closed"]]  # a rule decides on closed windows only
        assert closed
        checked = 0
        for w in closed:
            start = _instant(w["start"])
            b = next(x for x in weekly.values() if _instant(x["window_start"]) == start)
            first = start.astimezone(tz).date()
            assert first.weekday() == 0 and start == _midnight(first, tz)
            assert _instant(b["window_end"]) == _instant(w["end"])
            assert _instant(w["end"]) == _midnight(first + timedelta(days=7), tz)
            assert b["value"] == w["predictions"]
            assert b["value"] == sum(per_day[first + timedelta(days=k)] for k in range(7))
            if first <= change < first + timedelta(days=7):
                length = (_instant(w["end"]) - start) / timedelta(hours=1)
                assert length == (167 if change == spring else 169)
                checked += 1
        assert checked == 1

        # the mix of regions: breached from the local day before the change on, compared
        # with the local days of the baseline dates, counted by zoneinfo
        mixed = [b for b in _breaches(tenant, ids["mix"]) if lo <= _instant(b["window_start"]) < hi]
        shifted = [d for d in days if d >= change - timedelta(days=1)]
        assert [_instant(b["window_start"]) for b in mixed] == [_midnight(d, tz) for d in shifted]
        base_days = {base_first + timedelta(days=k) for k in range((base_end - base_first).days)}
        expected = Counter(r for at, r in sent if at.astimezone(tz).date() in base_days)
        for b in mixed:
            assert _instant(b["baseline"]["start"]) == _midnight(base_first, tz)
            assert _instant(b["baseline"]["end"]) == _midnight(base_end, tz)
            assert b["baseline"]["counts"] == dict(expected)
    # the alert says its baseline's period in the model's local days
    (mix,) = [
        a
        for a in tenant.client.get("/v1/alerts", params={"model": MODEL}).json()["items"]
        if a["rule_id"] == ids["mix"]
    ]
    last = base_end - timedelta(days=1)
    assert f"({base_first.day}–{last.day} {last:%b})" in mix["description"], mix["description"]
    assert mix["time_zone"] == name
