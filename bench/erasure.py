"""Erasure by id at 200,000 predictions: by difference against delete-and-rebuild.

Loads one binary model (seeded numpy PCG64: 200,000 predictions uniform over 60 days,
Beta(2, 5) scores, outcomes Bernoulli(score), labels for predictions older than 10 days,
two tags) into a SQLite file and a fresh PostgreSQL database, over the app in process
(Starlette's TestClient, no network). Then, on each store:

- erasure: `DELETE /v1/models/{model}/predictions` with 1,000 random ids, `--rounds` times
  (distinct ids each round): the rows go and their contribution is taken out of the
  rollups by difference;
- the plain alternative, in the same run: delete 1,000 other ids' rows and rebuild the
  model's rollups from raw rows (what `belated rebuild` does);
- the check: every daily window of the model (whole model and one segment) after the
  erasures, against the same windows after a rebuild from the remaining raw rows (a
  recount), field by field (counts equal, floats within 1e-9 relative).

    .venv/bin/python bench/erasure.py [--n 200000] [--ids 1000] [--rounds 5]
        [--stores sqlite,postgresql]

It prints the load time, the median and max erasure time, the rebuild time, the ratio
rebuild / erasure (p50), the process's peak memory, and whether the windows agree.
"""

from __future__ import annotations

import argparse
import resource
import sys
import tempfile
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench.common import (  # noqa: E402
    create_database,
    drop_database,
    markdown_table,
    percentile,
    pg_url,
    setup_store,
)

BATCH = 10_000
MODEL = "returns"
DAYS = 60


def _load(client: Any, n: int, end: datetime) -> None:
    rng = np.random.default_rng(20261203)
    start = end - timedelta(days=DAYS)
    ts = np.sort(rng.uniform(start.timestamp(), end.timestamp() - 60, n))
    scores = (np.floor(rng.beta(2, 5, n) * 10_000) + 0.5) / 10_000
    actual = rng.random(n) < scores
    regions = ("north", "south", "east", "west")
    preds = [
        {
            "id": f"o-{i}",
            "ts": datetime.fromtimestamp(t, UTC).isoformat(),
            "score": float(s),
            "tags": {"region": regions[i % 4], "channel": ("web", "app")[i % 3 == 0]},
        }
        for i, (t, s) in enumerate(zip(ts, scores, strict=True))
    ]
    old = ts < (end - timedelta(days=10)).timestamp()
    labels = [{"id": f"o-{i}", "actual": int(actual[i])} for i in np.nonzero(old)[0]]
    for kind, items in (("predictions", preds), ("labels", labels)):
        for i in range(0, len(items), BATCH):
            r = client.post(f"/v1/models/{MODEL}/{kind}", json={kind: items[i : i + BATCH]})
            r.raise_for_status()


def _windows(client: Any, end: datetime) -> list[dict[str, Any]]:
    start = (end - timedelta(days=DAYS + 1)).date().isoformat()
    out = []
    for extra in ({}, {"tag.region": "north"}):
        params = {"granularity": "day", "start": start, **extra}
        r = client.get(f"/v1/models/{MODEL}/metrics", params=params)
        r.raise_for_status()
        out.append(r.json())
    return out


def _differences(a: Any, b: Any, path: str = "") -> tuple[int, float]:
    """(fields that differ beyond 1e-9 relative or in kind, largest relative float gap)."""
    if isinstance(a, dict) and isinstance(b, dict):
        if a.keys() != b.keys():
            return 1, 0.0
        found = [_differences(a[k], b[k], f"{path}.{k}") for k in a]
        return sum(f[0] for f in found), max((f[1] for f in found), default=0.0)
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            return 1, 0.0
        found = [_differences(x, y, path) for x, y in zip(a, b, strict=True)]
        return sum(f[0] for f in found), max((f[1] for f in found), default=0.0)
    if isinstance(a, float) and isinstance(b, float):
        gap = abs(a - b) / max(abs(a), abs(b), 1e-300)
        return int(gap > 1e-9), gap
    return int(a != b), 0.0


def _run(url: str, args: argparse.Namespace) -> list[str]:
    from fastapi.testclient import TestClient
    from sqlalchemy import delete, select

    from belated.app import create_app
    from belated.config import Settings
    from belated.store import refresh
    from belated.store.db import make_engine, make_sessionmaker, transaction
    from belated.store.tables import ModelRow, Prediction

    token, _ = setup_store(url)
    url = url.replace("postgresql://", "postgresql+psycopg://", 1)
    settings = Settings(database_url=url)
    engine = make_engine(url)
    sessions = make_sessionmaker(engine)
    app = create_app(settings, engine=engine, jobs=False)
    end = datetime.now(UTC).replace(minute=0, second=0, microsecond=0)
    chosen = np.random.default_rng(7).choice(args.n, args.ids * (args.rounds + 1), replace=False)
    rounds = [
        [f"o-{i}" for i in chosen[k * args.ids : (k + 1) * args.ids]]
        for k in range(args.rounds + 1)
    ]
    max_values = settings.max_segment_values
    with TestClient(app) as client:
        client.headers["Authorization"] = f"Bearer {token}"
        client.post("/v1/models", json={"name": MODEL}).raise_for_status()
        t0 = time.perf_counter()
        _load(client, args.n, end)
        refresh.refresh_all(sessions, max_values=max_values)
        load_s = time.perf_counter() - t0
        with sessions() as session:
            mid = session.scalar(select(ModelRow.id).where(ModelRow.name == MODEL))

        times = []  # erasure by difference, one request of args.ids ids a round
        for ids in rounds[:-1]:
            t0 = time.perf_counter()
            r = client.request("DELETE", f"/v1/models/{MODEL}/predictions", json={"ids": ids})
            times.append(time.perf_counter() - t0)
            r.raise_for_status()
            assert r.json()["erased"]["predictions"] == len(ids), r.text
        erased = _windows(client, end)
        # the recount: every rollup rebuilt from the raw rows the erasures left
        refresh.rebuild(sessions, max_values=max_values, model_id=mid)
        differ, gap = _differences(erased, _windows(client, end))

        # the plain alternative, same store, same size: delete the rows, rebuild the model
        t0 = time.perf_counter()
        with transaction(sessions) as session:
            session.execute(
                delete(Prediction).where(Prediction.model_id == mid, Prediction.pid.in_(rounds[-1]))
            )
        refresh.rebuild(sessions, max_values=max_values, model_id=mid)
        plain_s = time.perf_counter() - t0
    engine.dispose()
    p50 = percentile(times, 0.5)
    return [
        f"{load_s:.0f}",
        f"{p50 * 1000:.0f}",
        f"{max(times) * 1000:.0f}",
        f"{plain_s * 1000:.0f}",
        f"{plain_s / p50:.1f}x",
        f"{differ} ({gap:.1e})",
    ]


def main() -> None:
    """Load, erase, recount, rebuild, print the table."""
    parser = argparse.ArgumentParser()
    parser.add_argument("--n", type=int, default=200_000)
    parser.add_argument("--ids", type=int, default=1_000)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--stores", default="sqlite,postgresql")
    args = parser.parse_args()
    rows = []
    for store in args.stores.split(","):
        if store == "sqlite":
            with tempfile.TemporaryDirectory() as folder:
                rows.append([store, *_run(f"sqlite:///{folder}/bench.db", args)])
        else:
            name = create_database("belated_erasure")
            try:
                rows.append([store, *_run(pg_url(name), args)])
            finally:
                drop_database(name)
        print(f"{store} done", flush=True)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(
        f"{args.n:,} predictions over {DAYS} days; {args.rounds} erasures of {args.ids:,} ids;"
        f" peak memory of the process {peak:.0f} MiB"
    )
    headers = [
        "store",
        "load + refresh s",
        "erase p50 ms",
        "erase max ms",
        "delete + rebuild ms",
        "rebuild / erase (p50)",
        "window fields differing (largest float gap)",
    ]
    print(markdown_table(headers, rows))


if __name__ == "__main__":
    main()
