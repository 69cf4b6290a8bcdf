"""A rolling window reports its true span: `start` is its first part's start, in the API,
the client's DataFrame and the CLI table alike (DESIGN.md "HTTP API": "a rolling window's
`start` is its first part's start")."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pandas as pd
from sqlalchemy import Engine

from belated.client import Client
from tests.client import invoke
from tests.conftest import LiveServer, Tenant
from tests.support import create_model, send, stamp, utcnow

ALL = "admin,ingest,read"


def _orders(first: datetime, days: int, per_day: int, seed: int) -> list[dict[str, object]]:
    rng = np.random.default_rng(seed)
    return [
        {
            "id": f"order-{d}-{i}",
            "ts": stamp(first + timedelta(days=d, minutes=int(rng.integers(0, 1440)))),
            "score": float(rng.uniform()),
        }
        for d in range(days)
        for i in range(per_day + d)  # a different count each day
    ]


def test_seven_day_rolling_window_spans_seven_days_in_api_and_client(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    first = datetime(2026, 11, 1, tzinfo=UTC)
    orders = _orders(first, 12, 30, seed=11)
    send(tenant.client, model.name, "predictions", orders)
    params = {"rolling": 7, "start": "2026-11-11", "end": "2026-11-12"}
    r = tenant.client.get(f"/v1/models/{model.name}/metrics", params=params)
    assert r.status_code == 200, r.text
    (window,) = r.json()["windows"]
    assert (window["start"], window["end"]) == ("2026-11-05T00:00:00Z", "2026-11-12T00:00:00Z")
    in_span = [o for o in orders if "2026-11-05" <= str(o["ts"])[:10] < "2026-11-12"]
    assert window["predictions"] == len(in_span) == sum(30 + d for d in range(4, 11))
    with Client(live.url, tenant.tokens[ALL]) as c:
        frame = c.metrics(model.name, rolling=7, start="2026-11-11", end="2026-11-12")
    assert list(frame["start"]) == [pd.Timestamp("2026-11-05", tz="UTC")]
    assert list(frame["end"]) == [pd.Timestamp("2026-11-12", tz="UTC")]


def test_the_cli_table_shows_the_rolling_windows_first_day(
    live: LiveServer, tenant: Tenant, engine: Engine
) -> None:
    model = create_model(tenant, engine)
    today = utcnow().replace(hour=0, minute=0, second=0, microsecond=0)
    send(tenant.client, model.name, "predictions", _orders(today - timedelta(days=10), 10, 20, 3))
    run = invoke(
        "windows", "--model", model.name, "--rolling", "7", "--last", "2",
        url=live.url, token=tenant.tokens["read"],
    )  # fmt: skip
    assert run.exit_code == 0, run.output
    api = tenant.client.get(f"/v1/models/{model.name}/metrics", params={"rolling": 7}).json()
    latest = [w["start"][:10] for w in api["windows"][-2:]]
    assert latest == [
        (today - timedelta(days=7)).date().isoformat(),
        (today - timedelta(days=6)).date().isoformat(),
    ]
    printed = [line for line in run.output.splitlines() if any(day in line for day in latest)]
    assert [next(d for d in latest if d in line) for line in printed] == latest
