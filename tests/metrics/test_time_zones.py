"""Day and week windows in a model's time zone, across both daylight-saving changes.

Each local day's predictions are recounted from the raw timestamps with `zoneinfo` (the
standard library's reading of the IANA tz database). The 2026 changes: Europe/Berlin on
29 March and 25 October (Directive 2000/84/EC: the last Sundays of March and October, at
01:00 UTC), America/Chicago on 8 March and 1 November (Energy Policy Act of 2005, sec. 110:
the second Sunday of March and the first Sunday of November, at 02:00 local).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from sqlalchemy import Engine

from belated.clock import clock
from tests.conftest import Tenant
from tests.support import create_model, rows, send, stamp

NOW = datetime(2026, 12, 1, 12, tzinfo=UTC)
CHANGES = {
    "Europe/Berlin": (date(2026, 3, 29), date(2026, 10, 25)),
    "America/Chicago": (date(2026, 3, 8), date(2026, 11, 1)),
}
SPAN_DAYS = 4  # local days sent on either side of each change


@pytest.fixture()
def frozen_late() -> Iterator[None]:
    """The clock after both changes (every window closed)."""
    clock.set(NOW)
    yield
    clock.set(None)


def _times(name: str, seed: int) -> np.ndarray:
    """Seeded prediction times (Unix seconds), uniform over the local days around both
    changes, denser in the small hours where the changes fall."""
    rng = np.random.default_rng(seed)
    tz = ZoneInfo(name)
    out = []
    for change in CHANGES[name]:
        lo = datetime.combine(change - timedelta(days=SPAN_DAYS), datetime.min.time(), tz)
        hi = datetime.combine(change + timedelta(days=SPAN_DAYS), datetime.min.time(), tz)
        a, b = lo.timestamp(), hi.timestamp()
        out.append(rng.uniform(a, b, 1500))
        night = change  # hours 0-4 local of the change day and the day before
        for d in (night - timedelta(days=1), night):
            start = datetime.combine(d, datetime.min.time(), tz).timestamp()
            out.append(rng.uniform(start, start + 5 * 3600, 150))
    return np.sort(np.concatenate(out))


def _send(
    tenant: Tenant, model: str, ts: np.ndarray, seed: int, labels: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """Uniform scores, and the outcomes (returned with probability score), sent as labels
    when `labels` is set."""
    rng = np.random.default_rng(seed + 1)
    scores = rng.uniform(0, 1, len(ts))
    items = [
        {"id": f"order-{i}", "ts": stamp(datetime.fromtimestamp(t, UTC)), "score": float(s)}
        for i, (t, s) in enumerate(zip(ts, scores, strict=True))
    ]
    send(tenant.client, model, "predictions", items)
    actual = rng.random(len(ts)) < scores
    if labels:
        outcomes = [{"id": f"order-{i}", "actual": int(a)} for i, a in enumerate(actual)]
        send(tenant.client, model, "labels", outcomes)
    return scores, actual


def _confusion(scores: np.ndarray, actual: np.ndarray, rows_: np.ndarray) -> dict[str, int]:
    flagged = scores >= 0.5
    return {
        "tp": int((rows_ & flagged & actual).sum()),
        "fp": int((rows_ & flagged & ~actual).sum()),
        "fn": int((rows_ & ~flagged & actual).sum()),
        "tn": int((rows_ & ~flagged & ~actual).sum()),
    }


def _local_days(ts: np.ndarray, name: str) -> Counter[date]:
    tz = ZoneInfo(name)
    return Counter(datetime.fromtimestamp(t, UTC).astimezone(tz).date() for t in ts)


def _metrics(tenant: Tenant, model: str, **params: Any) -> list[dict[str, Any]]:
    r = tenant.client.get(f"/v1/models/{model}/metrics", params=params)
    assert r.status_code == 200, r.text
    return list(r.json()["windows"])


@pytest.mark.parametrize("name", sorted(CHANGES))
def test_days_and_weeks_start_at_local_midnight_and_count_their_local_predictions(
    tenant: Tenant, engine: Engine, frozen_late: None, name: str
) -> None:
    tz = ZoneInfo(name)
    seed = 20261129 + len(name)
    model = create_model(tenant, engine, time_zone=name)
    ts = _times(name, seed)
    scores, actual = _send(tenant, model.name, ts, seed, labels=True)
    per_day = _local_days(ts, name)
    for change in CHANGES[name]:
        first, last = change - timedelta(days=SPAN_DAYS), change + timedelta(days=SPAN_DAYS)
        # bare dates are local days
        windows = _metrics(tenant, model.name, start=first.isoformat(), end=last.isoformat())
        days = [first + timedelta(days=k) for k in range(2 * SPAN_DAYS)]
        assert [w["start"] for w in windows] == [
            datetime.combine(d, datetime.min.time(), tz).isoformat() for d in days
        ]
        assert [w["end"] for w in windows] == [
            datetime.combine(d + timedelta(days=1), datetime.min.time(), tz).isoformat()
            for d in days
        ]
        for w, d in zip(windows, days, strict=True):
            hours = (datetime.fromisoformat(w["end"]) - datetime.fromisoformat(w["start"])) / (
                timedelta(hours=1)
            )
            assert hours == (23 if d == CHANGES[name][0] else 25 if d == CHANGES[name][1] else 24)
            assert w["predictions"] == per_day[d], d
            local = np.array(
                [datetime.fromtimestamp(t, UTC).astimezone(tz).date() == d for t in ts]
            )
            rate = float((scores[local] >= 0.5).mean())
            assert w["measures"]["positive_rate"]["value"] == pytest.approx(rate, rel=1e-12)
            assert w["confusion"] == _confusion(scores, actual, local)
        # weeks: Monday local midnight, each holding its local days' predictions
        monday = first - timedelta(days=first.weekday())
        weeks = _metrics(
            tenant,
            model.name,
            granularity="week",
            start=monday.isoformat(),
            end=(last + timedelta(days=7)).isoformat(),
        )
        for w in weeks:
            begin = datetime.fromisoformat(w["start"])
            assert begin.astimezone(tz).weekday() == 0
            assert begin.astimezone(tz).time() == datetime.min.time()
            week_days = {begin.astimezone(tz).date() + timedelta(days=k) for k in range(7)}
            assert w["predictions"] == sum(per_day[d] for d in week_days)
            # a week sums the UTC days inside it and the hours of the days its ends cut
            inside = np.array(
                [datetime.fromtimestamp(t, UTC).astimezone(tz).date() in week_days for t in ts]
            )
            if inside.any():
                rate = float((scores[inside] >= 0.5).mean())
                assert w["measures"]["positive_rate"]["value"] == pytest.approx(rate, rel=1e-12)
                assert w["confusion"] == _confusion(scores, actual, inside)
                brier = float(np.mean((scores[inside] - actual[inside]) ** 2))
                assert w["measures"]["brier"]["value"] == pytest.approx(brier, rel=1e-9)
    # rollups stay per UTC hour: the daily rows are UTC days
    starts = rows(
        engine,
        "SELECT start FROM rollups WHERE model_id = :m AND level = 'd' AND seg_key = ''",
        m=model.id,
    )
    assert starts and all(int(s) % 24 == 0 for (s,) in starts)


def test_times_with_an_offset_are_instants_aligned_in_the_models_zone(
    tenant: Tenant, engine: Engine, frozen_late: None
) -> None:
    name = "Europe/Berlin"
    model = create_model(tenant, engine, time_zone=name)
    ts = _times(name, 7)
    _send(tenant, model.name, ts, 7)
    # 23:30 UTC on 28 March is 00:30 on the 29th in Berlin (still UTC+1): the 29th's window;
    # 05:00 at UTC-5 on the 31st is noon there, aligned down to the 31st (the end, excluded)
    windows = _metrics(
        tenant, model.name, start="2026-03-28T23:30:00Z", end="2026-03-31T05:00:00-05:00"
    )
    assert [w["start"] for w in windows] == [
        "2026-03-29T00:00:00+01:00",
        "2026-03-30T00:00:00+02:00",
    ]
    # the same instants asked of a UTC model give UTC days
    utc = create_model(tenant, engine)
    _send(tenant, utc.name, ts, 7)
    windows = _metrics(
        tenant, utc.name, start="2026-03-28T23:30:00Z", end="2026-03-31T05:00:00-05:00"
    )
    assert [w["start"] for w in windows] == [
        "2026-03-28T00:00:00Z",
        "2026-03-29T00:00:00Z",
        "2026-03-30T00:00:00Z",
    ]


def test_changing_the_zone_regroups_the_same_hours(
    tenant: Tenant, engine: Engine, frozen_late: None
) -> None:
    name = "America/Chicago"
    model = create_model(tenant, engine)
    ts = _times(name, 11)
    _send(tenant, model.name, ts, 11)
    params = {"start": "2026-10-30", "end": "2026-11-03"}
    utc_days = _metrics(tenant, model.name, **params)
    r = tenant.client.patch(f"/v1/models/{model.name}", json={"time_zone": name})
    assert r.status_code == 200, r.text
    assert r.json()["time_zone"] == name
    local_days = _metrics(tenant, model.name, **params)
    per_day = _local_days(ts, name)
    assert [w["predictions"] for w in local_days] == [
        per_day[date(2026, 10, 30) + timedelta(days=k)] for k in range(4)
    ]
    assert [w["predictions"] for w in local_days] != [w["predictions"] for w in utc_days]
