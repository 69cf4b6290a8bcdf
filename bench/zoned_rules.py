"""The cost of a model time zone on rule evaluation, at the demo's size.

A UTC model's day and week windows are sums of daily rollup rows; a model whose local
midnights are not UTC midnights (Europe/Berlin) sums the hourly rows of each local day, and
a tag PSI rule reads hourly rows per tag value. This bench loads 90 days of about 1,500
orders a day (seeded numpy PCG64: Beta(2, 5) scores, outcomes Bernoulli(score), labels for
orders older than 10 days, four regions in turn) into one SQLite store, creates the same
rules on the model, then in the same run times `evaluate_rule` with the model's `time_zone`
UTC and Europe/Berlin (one PATCH between them; the rollups do not change). Each run rolls
back its transaction, so every run decides the same windows from scratch:

    .venv/bin/python bench/zoned_rules.py [--days 90] [--per-day 1500] [--repeat 9]

It prints, per rule, the median and 95th percentile time of one evaluation in each zone
and the ratio Berlin / UTC of the medians.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench.common import markdown_table, percentile, setup_store  # noqa: E402
from bench.time_zones import _load  # noqa: E402

RULES = {
    "drop, recall, day": {
        "kind": "drop",
        "measure": "recall",
        "tolerance": 0.02,
        "baseline": {"windows": 7},
    },
    "floor, precision, week": {
        "kind": "floor",
        "measure": "precision",
        "threshold": 0.5,
        "granularity": "week",
    },
    "shift, tag_psi:region, day": {"kind": "shift", "measure": "tag_psi:region", "threshold": 0.1},
    "traffic, day": {"kind": "traffic", "low": 100},
}


def _time(engine: Any, rule_id: str, now: datetime, repeat: int) -> list[float]:
    """Seconds of each evaluation of the rule, each in a transaction rolled back."""
    from sqlalchemy.orm import Session

    from belated.alerts.evaluate import evaluate_rule
    from belated.alerts.tables import Rule
    from belated.store.tables import ModelRow

    out = []
    for k in range(repeat + 1):
        with Session(engine) as session:
            rule = session.get(Rule, rule_id)
            assert rule is not None
            model = session.get(ModelRow, rule.model_id)
            assert model is not None
            t0 = time.perf_counter()
            evaluate_rule(session, rule, model, now, 100)
            if k:  # the first run warms the caches and refreshes the rollups
                out.append(time.perf_counter() - t0)
            else:
                session.commit()
                continue
            session.rollback()
    return out


def main() -> None:
    """Load, evaluate every rule in both zones, print the table."""
    parser = argparse.ArgumentParser()
    parser.add_argument("--days", type=int, default=90)
    parser.add_argument("--per-day", type=int, default=1500)
    parser.add_argument("--repeat", type=int, default=9)
    args = parser.parse_args()

    from fastapi.testclient import TestClient

    from belated.app import create_app
    from belated.config import Settings
    from belated.store.db import make_engine

    with tempfile.TemporaryDirectory() as folder:
        url = f"sqlite:///{folder}/bench.db"
        token, _ = setup_store(url)
        engine = make_engine(url)
        app = create_app(Settings(database_url=url), engine=engine, jobs=False)
        end = datetime.now(UTC).replace(minute=0, second=0, microsecond=0)
        results: dict[tuple[str, str], list[float]] = {}
        with TestClient(app) as client:
            client.headers["Authorization"] = f"Bearer {token}"
            client.post(
                "/v1/models", json={"name": "returns", "segment_keys": ["region"]}
            ).raise_for_status()
            t0 = time.perf_counter()
            n = _load(client, "returns", args.days, args.per_day, end)
            print(f"loaded {n:,} predictions in {time.perf_counter() - t0:.0f} s")
            ids = {}
            for label, body in RULES.items():
                r = client.post("/v1/models/returns/rules", json=body)
                r.raise_for_status()
                ids[label] = r.json()["id"]
            for zone in ("UTC", "Europe/Berlin"):
                client.patch("/v1/models/returns", json={"time_zone": zone}).raise_for_status()
                for label, rule_id in ids.items():
                    results[(label, zone)] = _time(engine, rule_id, end, args.repeat)
        engine.dispose()
    rows = []
    for label in RULES:
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
        "rule",
        "UTC p50 ms",
        "UTC p95 ms",
        "Berlin p50 ms",
        "Berlin p95 ms",
        "Berlin / UTC (p50)",
    ]
    print(markdown_table(headers, rows))


if __name__ == "__main__":
    main()
