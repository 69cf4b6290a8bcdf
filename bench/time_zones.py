"""The cost of a model time zone on GET /v1/models/{model}/metrics, at the demo's size.

Rollups are kept per UTC hour and per UTC day. A UTC model's day and week windows are
sums of daily rows; a model in a zone whose midnights are not UTC midnights (Europe/Berlin)
sums the hourly rows of each local day instead, 24 times as many rows. This bench loads the
demo's volume (90 days of about 1,500 orders a day, seeded numpy PCG64: Beta(2, 5) scores,
outcomes Bernoulli(score), labels for orders older than 10 days) into one SQLite store,
then in the same run times the same requests on the same data with the model's
`time_zone` UTC and Europe/Berlin (one PATCH between them; rollups do not change), over
the app in process (Starlette's TestClient, no network):

    .venv/bin/python bench/time_zones.py [--days 90] [--per-day 1500] [--repeat 15]

It prints the median and 95th percentile latency of each request, the rollup rows the
answer sums, and the ratio Berlin / UTC.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench.common import markdown_table, percentile, setup_store  # noqa: E402

BATCH = 10_000


def _load(client: Any, model: str, days: int, per_day: int, end: datetime) -> int:
    rng = np.random.default_rng(20261202)
    start = end - timedelta(days=days)
    n = days * per_day
    ts = np.sort(rng.uniform(start.timestamp(), end.timestamp() - 60, n))
    scores = (np.floor(rng.beta(2, 5, n) * 10_000) + 0.5) / 10_000
    actual = rng.random(n) < scores
    preds = [
        {
            "id": f"o-{i}",
            "ts": datetime.fromtimestamp(t, UTC).isoformat(),
            "score": float(s),
            "tags": {"region": ("north", "south", "east", "west")[i % 4]},
        }
        for i, (t, s) in enumerate(zip(ts, scores, strict=True))
    ]
    old = ts < (end - timedelta(days=10)).timestamp()
    labels = [{"id": f"o-{i}", "actual": int(actual[i])} for i in np.nonzero(old)[0]]
    for kind, items in (("predictions", preds), ("labels", labels)):
        for i in range(0, len(items), BATCH):
            r = client.post(f"/v1/models/{model}/{kind}", json={kind: items[i : i + BATCH]})
            r.raise_for_status()
    return n


def _time(client: Any, model: str, params: dict[str, Any], repeat: int) -> list[float]:
    client.get(f"/v1/models/{model}/metrics", params=params).raise_for_status()  # warm
    out = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        r = client.get(f"/v1/models/{model}/metrics", params=params)
        out.append(time.perf_counter() - t0)
        r.raise_for_status()
    return out


def main() -> None:
    """Load, measure both zones, print the table."""
    parser = argparse.ArgumentParser()
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--per-day", type=int, default=1500)
    parser.add_argument("--repeat", type=int, default=15)
    args = parser.parse_args()

    from fastapi.testclient import TestClient

    from belated.app import create_app
    from belated.config import Settings

    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{folder}/bench.db"
        token, _ = setup_store(url)
        app = create_app(Settings(database_url=url), jobs=False)
        end = datetime.now(UTC).replace(minute=0, second=0, microsecond=0)
        with TestClient(app) as client:
            client.headers["Authorization"] = f"Bearer {token}"
            client.post("/v1/models", json={"name": "returns"}).raise_for_status()
            t0 = time.perf_counter()
            n = _load(client, "returns", args.days, args.per_day, end)
            print(f"loaded {n:,} predictions in {time.perf_counter() - t0:.0f} s")
            requests = {
                "day, last 30": {"granularity": "day"},
                f"day, {args.days} days": {
                    "granularity": "day",
                    "start": (end - timedelta(days=args.days)).date().isoformat(),
                },
                "week, last 13": {
                    "granularity": "week",
                    "start": (end - timedelta(days=91)).date().isoformat(),
                },
                "day, last 30, tag": {"granularity": "day", "tag.region": "north"},
            }
            results: dict[tuple[str, str], list[float]] = {}
            for zone in ("UTC", "Europe/Berlin"):
                r = client.patch("/v1/models/returns", json={"time_zone": zone})
                r.raise_for_status()
                for label, params in requests.items():
                    results[(label, zone)] = _time(client, "returns", params, args.repeat)
        rows = []
        for label in requests:
            utc, berlin = results[(label, "UTC")], results[(label, "Europe/Berlin")]
            rows.append(
                [
                    label,
                    f"{percentile(utc, 0.5) * 1000:.0f}",
                    f"{percentile(utc, 0.95) * 1000:.0f}",
                    f"{percentile(berlin, 0.5) * 1000:.0f}",
                    f"{percentile(berlin, 0.95) * 1000:.0f}",
                    f"{percentile(berlin, 0.5) / percentile(utc, 0.5):.2f}x",
                ]
            )
        headers = [
            "request",
            "UTC p50 ms",
            "UTC p95 ms",
            "Berlin p50 ms",
            "Berlin p95 ms",
            "Berlin / UTC (p50)",
        ]
        print(markdown_table(headers, rows))


if __name__ == "__main__":
    main()
