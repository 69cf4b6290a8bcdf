"""The dashboard over real HTTP (uvicorn on loopback) shows a zoned model's windows, alerts
and markers in its local time with the offset; a UTC model's pages read as they always did.

Every expected text is built with the standard library's `zoneinfo` (its reading of the IANA
tz database). Europe/Berlin springs forward on 29 March 2026 (Directive 2000/84/EC: the last
Sunday of March, at 01:00 UTC), so that local day lasts 23 hours.

Data (seeded): 200 predictions a local day from 26 to 31 March (30 of them in the first two
local hours), uniform scores; a traffic rule with `high: 150` breaches every one of those days.
"""

from __future__ import annotations

import html as htmllib
import re
from collections.abc import Iterator
from datetime import UTC, date, datetime, time, timedelta
from typing import Any
from zoneinfo import ZoneInfo

import httpx
import numpy as np
import pytest

from belated.alerts.evaluate import evaluate_rule
from belated.alerts.tables import Rule
from belated.clock import clock
from belated.store.db import transaction
from belated.store.tables import ModelRow
from tests.conftest import LiveServer, Tenant, make_tenant
from tests.support import post_model, send

CHANGE = date(2026, 3, 29)
DAYS = [CHANGE + timedelta(days=k) for k in range(-3, 3)]
NOW = datetime(2026, 4, 2, 10, tzinfo=UTC)


def _offset(at: datetime) -> str:
    z = at.strftime("%z")
    return f"{z[:3]}:{z[3:]}"


def _wall(at: datetime, tz: ZoneInfo, fmt: str) -> str:
    local = at.astimezone(tz)
    return f"{local.strftime(fmt)} {_offset(local)}"


def _midnight(day: date, tz: Any) -> datetime:
    return datetime.combine(day, time(0), tzinfo=tz)


@pytest.fixture()
def http(live: LiveServer, sessions: Any) -> Iterator[Tenant]:
    """A tenant whose client talks to the live server; the clock held at NOW."""
    clock.set(NOW)
    with httpx.Client(base_url=live.url, timeout=60) as client:
        yield make_tenant(sessions, client)
    clock.set(None)


def _model(tenant: Tenant, sessions: Any, name: str, time_zone: str) -> None:
    """The stated data on a model in `time_zone`, its traffic rule evaluated at NOW."""
    tz = ZoneInfo(time_zone)
    post_model(tenant.client, name, time_zone=time_zone, label_delay_days=2)
    rng = np.random.default_rng(29)
    items: list[dict[str, Any]] = []
    for day in DAYS:
        lo = _midnight(day, tz).astimezone(UTC)
        span = (_midnight(day + timedelta(days=1), tz).astimezone(UTC) - lo).total_seconds()
        for off in np.r_[rng.uniform(0, span, 170), rng.uniform(0, 7200, 30)]:
            at = lo + timedelta(seconds=float(off))
            items.append({"id": f"o-{len(items)}", "ts": at.isoformat(), "score": rng.random()})
    send(tenant.client, name, "predictions", items)
    rule = tenant.client.post(f"/v1/models/{name}/rules", json={"kind": "traffic", "high": 150})
    assert rule.status_code == 201, rule.text
    with transaction(sessions) as session:
        row = session.get(Rule, rule.json()["id"])
        assert row is not None
        evaluate_rule(session, row, session.get(ModelRow, row.model_id), NOW, 100)
    marker = {"at": "2026-03-29T09:30:00+02:00", "text": "new sofa supplier in the north"}
    assert tenant.client.post(f"/v1/models/{name}/markers", json=marker).status_code == 201


def _page(tenant: Tenant, path: str, **params: Any) -> str:
    r = tenant.client.get(path, params=params, headers=tenant.headers("read"))
    assert r.status_code == 200, r.text[:2000]
    return htmllib.unescape(r.text)


def test_a_zoned_model_page_shows_local_windows_marks_and_times_with_offsets(
    http: Tenant, sessions: Any
) -> None:
    tz = ZoneInfo("Europe/Berlin")
    _model(http, sessions, "returns-berlin", "Europe/Berlin")
    start, end = DAYS[0].isoformat(), (DAYS[-1] + timedelta(days=1)).isoformat()
    page = _page(http, "/models/returns-berlin", start=start, end=end)
    # the table of windows: local midnights, wall time with the offset of each
    cells = re.findall(r'<td class="wstart">([^<]+)</td>', page)
    expected = [_wall(_midnight(d, tz), tz, "%Y-%m-%d %H:%M") for d in DAYS]
    assert cells == expected[::-1]  # newest first
    assert "2026-03-29 00:00 +01:00" in cells and "2026-03-30 00:00 +02:00" in cells
    assert "From (Europe/Berlin)" in page
    shown = re.search(r'id="shown"[^>]*>[^,]*,\s*([^.]+?)\s*\(Europe/Berlin\)', page)
    assert shown, page[:3000]
    assert shown.group(1).split(" to ") == [
        _wall(_midnight(DAYS[0], tz), tz, "%d %b %Y %H:%M"),
        _wall(_midnight(DAYS[-1] + timedelta(days=1), tz), tz, "%d %b %Y %H:%M"),
    ]
    # the precision chart's axis labels are the local dates, not the UTC ones
    svg = re.search(r'<svg [^>]*id="m-precision".*?</svg>', page, re.S)
    assert svg
    axis = re.search(r'<g class="xaxis">(.*?)</g>', svg.group(0), re.S)
    assert axis
    labels = re.findall(r"<text[^>]*>([^<]+)</text>", axis.group(1))
    # every other day is labelled on a crowded axis: the local dates, from the first on
    every = len(DAYS) // len(labels)
    assert labels == [d.strftime("%d %b") for d in DAYS[::every]]
    keys = set(re.findall(r'data-window="([^"]+)"', svg.group(0)))
    # the alert at its first breached local day; the marker at the local day it falls in
    first = _midnight(DAYS[0], tz).isoformat()
    alert = re.findall(r'<g class="mark alert"[^>]*data-window="([^"]+)"', svg.group(0))
    assert alert == [first]
    marker = re.findall(
        r'<g class="mark marker"[^>]*data-window="([^"]+)"[^>]*><title>([^<]+)</title>',
        svg.group(0),
    )
    assert [m[0] for m in marker] == [_midnight(CHANGE, tz).isoformat()]
    assert "29 Mar 2026 09:30 +02:00" in marker[0][1]
    assert {first, _midnight(CHANGE, tz).isoformat()} <= keys


def test_the_alerts_page_gives_a_zoned_alert_its_local_windows(http: Tenant, sessions: Any) -> None:
    tz = ZoneInfo("Europe/Berlin")
    _model(http, sessions, "returns-berlin", "Europe/Berlin")
    page = _page(http, "/alerts", model="returns-berlin")
    started = re.search(r'<span class="started">([^<]+)</span>', page)
    assert started and started.group(1) == _wall(_midnight(DAYS[0], tz), tz, "%d %b %Y %H:%M")
    alert = http.client.get("/v1/alerts", params={"model": "returns-berlin"}).json()["items"][0]
    raised = datetime.fromisoformat(alert["raised_at"])
    assert f"raised {_wall(raised, tz, '%d %b %Y %H:%M')}" in page
    assert "times in Europe/Berlin" in page
    rows = re.findall(r'<tr class="breach">\s*<td>([^<]+)</td>\s*<td>([^<]+)</td>', page)
    by_day = dict(rows)
    # the short day names its 23 hours and the offsets at its two midnights
    a, b = _midnight(CHANGE, tz), _midnight(CHANGE + timedelta(days=1), tz)
    assert (b.astimezone(UTC) - a.astimezone(UTC)) / timedelta(hours=1) == 23
    short = f"{a:%a %d %b %Y} (23 h: {_offset(a)} to {_offset(b)})"
    assert short in by_day
    assert f"{_midnight(DAYS[0], tz):%a %d %b %Y}" in by_day  # a plain day, one offset
    # the value column reads the count with three decimals, as every value
    assert re.fullmatch(r"\d+\.\d{3}", by_day[short])


def test_a_utc_model_reads_as_before(http: Tenant, sessions: Any) -> None:
    _model(http, sessions, "returns-utc", "UTC")
    page = _page(
        http,
        "/models/returns-utc",
        start=DAYS[0].isoformat(),
        end=(DAYS[-1] + timedelta(days=1)).isoformat(),
    )
    cells = re.findall(r'<td class="wstart">([^<]+)</td>', page)
    assert cells == [f"{d.isoformat()} 00:00" for d in DAYS][::-1]
    assert "From (UTC)" in page and "+01:00" not in page
    alerts = _page(http, "/alerts", model="returns-utc")
    started = re.search(r'<span class="started">([^<]+)</span>', alerts)
    assert started and started.group(1) == f"{DAYS[0]:%d %b %Y} 00:00"
    assert "times in" not in alerts
    assert f"{_midnight(CHANGE, UTC):%a %d %b %Y}</td>" in alerts
