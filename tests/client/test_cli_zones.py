"""`belated windows` and `belated alerts list` print a zoned model's times as its local wall
time with the offset, checked against the standard library's `zoneinfo`.

The 2026 changes: Europe/Berlin springs forward on 29 March (Directive 2000/84/EC: the last
Sunday of March, at 01:00 UTC); America/Chicago falls back on 1 November (Energy Policy Act
of 2005, sec. 110: the first Sunday of November, at 02:00 local).
"""

from __future__ import annotations

import csv
import io
from collections import Counter
from datetime import UTC, date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from click.testing import Result

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.tables import Rule
from belated.clock import clock
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.client import invoke
from tests.client.test_cli_windows import table_rows
from tests.conftest import LiveServer, Tenant
from tests.support import post_model, send

CHANGES = {"Europe/Berlin": date(2026, 3, 29), "America/Chicago": date(2026, 11, 1)}
MODEL = "returns-zoned"


def _wall(at: datetime, tz: ZoneInfo) -> str:
    """Wall time and offset as zoneinfo gives them: "2026-03-30 00:00 +02:00"."""
    local = at.astimezone(tz)
    z = local.strftime("%z")
    return f"{local:%Y-%m-%d %H:%M} {z[:3]}:{z[3:]}"


def _midnight(day: date, tz: ZoneInfo) -> datetime:
    return datetime.combine(day, time(0), tzinfo=tz)


def _ok(result: Result) -> str:
    assert result.exit_code == 0, (result.output, result.exception)
    return result.output


def _feed(tenant: Tenant, name: str) -> Counter[date]:
    """200 predictions a local day for the 2 days before and after the change, 30 of them in
    the first two local hours (a UTC day would cut there); returns the count per local day."""
    tz = ZoneInfo(name)
    rng = np.random.default_rng(31 + len(name))
    change = CHANGES[name]
    items: list[dict[str, Any]] = []
    for k in range(-2, 2):
        lo = _midnight(change + timedelta(days=k), tz).astimezone(UTC)
        hi = _midnight(change + timedelta(days=k + 1), tz).astimezone(UTC)
        span = (hi - lo).total_seconds()
        for off in np.r_[rng.uniform(0, span, 170), rng.uniform(0, 7200, 30)]:
            at = lo + timedelta(seconds=float(off))
            items.append({"id": f"o-{len(items)}", "ts": at.isoformat(), "score": rng.random()})
    send(tenant.client, MODEL, "predictions", items)
    return Counter(datetime.fromisoformat(i["ts"]).astimezone(tz).date() for i in items)


@pytest.mark.parametrize("name", sorted(CHANGES))
def test_windows_print_local_midnights_with_their_offsets(
    live: LiveServer, tenant: Tenant, name: str
) -> None:
    tz = ZoneInfo(name)
    post_model(tenant.client, MODEL, time_zone=name)
    per_day = _feed(tenant, name)
    change = CHANGES[name]
    days = [change + timedelta(days=k) for k in range(-2, 2)]
    span = ("--start", days[0].isoformat(), "--end", (days[-1] + timedelta(days=1)).isoformat())
    read = tenant.tokens["read"]
    out = _ok(invoke("windows", "--model", MODEL, *span, url=live.url, token=read))
    assert f"4 day windows ({name})" in out
    body = table_rows(out)[1:]
    assert [cells[0] for cells in body] == [_wall(_midnight(d, tz), tz) for d in days]
    # the offsets differ across the change: the day of the change is 23 or 25 hours long
    assert body[0][0][-6:] != body[-1][0][-6:]
    assert [int(cells[1]) for cells in body] == [per_day[d] for d in days]
    text = _ok(
        invoke("windows", "--model", MODEL, *span, "--format", "csv", url=live.url, token=read)
    )
    got = list(csv.DictReader(io.StringIO(text)))
    assert [r["start"] for r in got] == [_midnight(d, tz).isoformat() for d in days]
    assert [r["end"] for r in got] == [
        _midnight(d + timedelta(days=1), tz).isoformat() for d in days
    ]


def test_alerts_list_prints_the_start_in_the_model_zone(
    live: LiveServer, tenant: Tenant, sessions: Any
) -> None:
    name = "Europe/Berlin"
    tz = ZoneInfo(name)
    post_model(tenant.client, MODEL, time_zone=name)
    _feed(tenant, name)
    now = _midnight(CHANGES[name] + timedelta(days=2), tz).astimezone(UTC) + timedelta(hours=12)
    clock.set(now)
    rule = tenant.client.post(
        f"/v1/models/{MODEL}/rules", json={"kind": "traffic", "low": 1e9}
    ).json()
    with transaction(sessions) as session:
        row = session.get(Rule, rule["id"])
        assert row is not None
        evaluate_rule(session, row, session.get(ModelRow, row.model_id), now, 100)
    alert = tenant.client.get("/v1/alerts", params={"model": MODEL}).json()["items"][0]
    assert alert["time_zone"] == name
    started = datetime.fromisoformat(alert["started_at"])
    # the first window the rule decided on is a local day: it starts at local midnight
    assert started.astimezone(tz).time() == time(0)
    read = tenant.tokens["read"]
    body = table_rows(_ok(invoke("alerts", "list", url=live.url, token=read)))
    column = body[0].index("started_at")
    assert body[1][column] == _wall(started, tz)
    text = _ok(invoke("alerts", "list", "--format", "csv", url=live.url, token=read))
    (row_,) = list(csv.DictReader(io.StringIO(text)))
    assert row_["started_at"] == started.astimezone(tz).isoformat()
