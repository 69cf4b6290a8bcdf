"""Costs as the PostgreSQL store grows: does the work of a day cost the same at every size?

For each size (default 1M and 5M predictions; `--sizes 10000000,50000000` for the full run)
a database of its own gets a year of the furniture shop's orders (bench/windows_data.py:
2025-01-01 to 2026-01-01, 99% labelled), loaded by COPY into the day partitions, rollups
built by `belated rebuild`'s code. Then, in the same run:

- label matching, after the last 60 days are read into the OS cache (`warm`; a service
  taking labels all day keeps them there): batches of 1,000 and of 20 random stored ids
  found the way label ingest finds them (through the id registry, then one day partition)
  against the same look-up on a flat copy of the table with UNIQUE (model, id) (the plain
  alternative), and by id alone across every partition (what the registry avoids);
- a day of new work over HTTP (`belated serve`, loopback), the same at every size (a day of the
  10M store, 27,397 orders): the next day's predictions in
  bulk requests of 10,000, then 20-prediction requests from 8 threads for 10 s, then labels
  for predictions of the last 60 days (as many as a day's predictions) in bulk requests;
- the refresh of that day's work (a child process, as the jobs run it);
- the metrics query for 365 daily windows, p50 and p95 of 30 requests;
- disk: the database, the predictions (all partitions) and the registry;
- then retention: the raw days older than `--keep-days` (90) before the new day are dropped
  (their rollups stay), and disk and the metrics query are measured again.

Run: `python -m bench.scale [--sizes 1000000,5000000] [--keep-days 90] [--label-rows N]`.
`--label-rows N` draws the HTTP labels from the last N orders instead of the last 60 days:
the same N at every size keeps the labels as dense in the table as at the smaller size
(at 50M the last 60 days hold five times the rows, so the same number of labels touches
more pages). `BELATED_BENCH_PG_ADMIN` points it at another PostgreSQL server.
"""

from __future__ import annotations

import argparse
import statistics
import threading
import time
from datetime import UTC, datetime, timedelta
from typing import Any

import httpx
import numpy as np
import psycopg

from bench import windows_data as wd
from bench.common import Service, create_database, drop_database, markdown_table, percentile, pg_url
from bench.windows import latency, run_child

NEW_DAY = datetime(2026, 1, 1, tzinfo=UTC)
MATCH_FLAT = """
SELECT p.pid, p.row_id, p.ts, p.hour, p.actual, p.delay_h
FROM unnest(%(ids)s::text[]) AS k(pid) JOIN bench_flat p ON p.model_id = %(m)s AND p.pid = k.pid
ORDER BY p.row_id FOR UPDATE OF p"""
MATCH_SCAN = """
SELECT p.pid, p.row_id, p.ts, p.hour, p.actual, p.delay_h
FROM unnest(%(ids)s::text[]) AS k(pid) JOIN predictions p ON p.model_id = %(m)s AND p.pid = k.pid
ORDER BY p.row_id FOR UPDATE OF p"""


def disk(url: str) -> dict[str, float]:
    """MiB used by the database, the predictions' partitions and the id registry."""
    with psycopg.connect(url) as conn:
        db = conn.execute("SELECT pg_database_size(current_database())").fetchone()[0]
        parts = conn.execute(
            "SELECT coalesce(sum(pg_total_relation_size(inhrelid)), 0) FROM pg_inherits"
            " WHERE inhparent = 'predictions'::regclass"
        ).fetchone()[0]
        reg = conn.execute("SELECT pg_total_relation_size('prediction_ids')").fetchone()[0]
    return {"db": db / 2**20, "predictions": float(parts) / 2**20, "registry": reg / 2**20}


def _days_with_partitions(conn: psycopg.Connection[Any]) -> set[int]:
    """The days that have a partition (the service reads this at most every 30 s)."""
    return {
        int(
            datetime.strptime(name[len("predictions_p") :], "%Y%m%d")
            .replace(tzinfo=UTC)
            .timestamp()
        )
        // 86400
        for (name,) in conn.execute(
            "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid"
            " WHERE i.inhparent = 'predictions'::regclass AND c.relname LIKE 'predictions_p%'"
        )
    }


def _registry(conn: psycopg.Connection[Any], ids: list[str], model_id: int) -> list[Any]:
    """The label path's look-up (store/labels.py): one call of the store's function that
    reads each id's hour from the registry and locks the rows in their days' partitions."""
    from belated.store import labels

    sql = labels._TARGETS_SQL.replace("%(m)b", "%(m)s").replace("%(ids)b", "%(ids)s")
    return conn.execute(sql, {"ids": ids, "m": model_id}).fetchall()


def recent_start(n: int) -> int:
    """The first row of the last 60 days of the loaded year (rows follow time), where labels
    arrive: the look-ups, the warm step and the HTTP labels all draw from here on."""
    return int(n * 305 / 365)


def warm(url: str, model_id: int, n: int, flat: bool) -> float:
    """Read the last 60 days (where labels arrive) into the operating system's cache, as a
    service receiving labels all day keeps them: those days' partitions and indexes, their
    ids in the registry and, with `flat`, the same ids of the flat copy. Without it a store
    larger than the machine's memory with the flat copy beside it (50M: 17 GB and 6 GB
    against 23 GB) is measured cold for one side and warm for the other. Seconds taken."""
    t0 = time.perf_counter()
    first = wd.pid(recent_start(n))
    with psycopg.connect(url, autocommit=True) as conn:
        conn.execute("CREATE EXTENSION IF NOT EXISTS pg_prewarm")
        recent = [
            day
            for day in _days_with_partitions(conn)
            if (NEW_DAY - timedelta(days=61)).timestamp() // 86400 <= day
        ]
        from belated.store import partitions

        for day in recent:
            table = partitions.day_name(day)
            conn.execute(
                "SELECT pg_prewarm(c.oid, 'read') FROM pg_class c WHERE c.oid = %s::regclass"
                " OR c.oid IN (SELECT indexrelid FROM pg_index WHERE indrelid = %s::regclass)",
                (table, table),
            )
        # the ids' index pages and rows (ids follow time: a range), read through the index
        # so that its pages are the ones warmed, whatever the planner would prefer
        conn.execute("SET enable_seqscan = off")
        conn.execute("SET enable_bitmapscan = off")
        for table in ("prediction_ids", "bench_flat") if flat else ("prediction_ids",):
            conn.execute(
                f"SELECT sum(hour) FROM {table} WHERE model_id = %s AND pid >= %s",
                (model_id, first),
            )
    return time.perf_counter() - t0


def match(url: str, model_id: int, n: int, seed: int = 11) -> dict[str, float]:
    """Median ms per batch of finding (and locking) stored ids as label ingest does, through
    the registry, against a flat copy with UNIQUE (model, id) and by id alone across every
    partition; ids drawn from the last 60 days (where labels arrive) and from the whole
    year."""
    rng = np.random.default_rng(seed)
    with psycopg.connect(url) as conn:
        conn.execute(
            "CREATE TABLE bench_flat AS SELECT model_id, pid, row_id, ts, hour, actual, delay_h"
            " FROM predictions"
        )
        conn.execute("ALTER TABLE bench_flat ADD UNIQUE (model_id, pid)")
        conn.commit()
        conn.execute("ANALYZE bench_flat")
        conn.commit()
        out: dict[str, float] = {"warm_s": warm(url, model_id, n, flat=True)}
        recent = recent_start(n)
        for span, lo in (("60d", recent), ("year", 0)):
            for size, repeats in ((1000, 20), (20, 100)):
                times: dict[str, list[float]] = {"registry": [], "flat": [], "scan": []}
                for i in range(repeats):
                    ids = [wd.pid(int(j)) for j in lo + rng.choice(n - lo, size, replace=False)]
                    ways = ("registry", "flat", "scan")
                    for name in ways if i % 2 else ways[::-1]:
                        if name == "scan" and i >= 5:
                            continue  # slow by design: a few repeats tell its cost
                        t0 = time.perf_counter()
                        if name == "registry":
                            got = _registry(conn, ids, model_id)
                        else:
                            sql = MATCH_FLAT if name == "flat" else MATCH_SCAN
                            got = conn.execute(sql, {"ids": ids, "m": model_id}).fetchall()
                        times[name].append((time.perf_counter() - t0) * 1000)
                        conn.rollback()  # the locks go, as a request's would at its end
                        assert len(got) == len(ids), (name, len(got))
                for name, values in times.items():
                    out[f"{name}_{size}_{span}"] = statistics.median(values)
        conn.execute("DROP TABLE bench_flat")
        conn.commit()
    return out


DAY_ROWS = 10_000_000 // 365  # a day of the 10M store: the same day's work at every size


def new_day(rows: int = DAY_ROWS, seed: int = 5) -> list[dict[str, Any]]:
    """A day of new orders after the loaded year (the same generator's distributions). Its
    size is fixed, not a share of the store, so that every size does the same day's work and
    a cost that grows between sizes grows with the store."""
    d = wd.generate(rows, seed=seed)
    start = NEW_DAY.timestamp() - wd.YEAR_START.timestamp()
    return [
        {
            "id": f"new-{i}",
            "ts": datetime.fromtimestamp(
                wd.YEAR_START.timestamp() + start + float(d.ts[i] - d.ts[0]) / 365, UTC
            ).isoformat(),
            "score": float(d.score[i]),
            "tags": {"channel": wd.CHANNELS[d.channel[i]], "region": wd.REGIONS[d.region[i]]},
        }
        for i in range(d.n)
    ]


def http_day(
    service: Service, token: str, n: int, day: list[dict[str, Any]], label_rows: int = 0
) -> dict[str, float]:
    """Rows/s of the day's work over HTTP: bulk predictions, small requests, bulk labels (for
    orders of the last 60 days, or of the last `label_rows` orders)."""
    url = f"{service.url}/v1/models/{wd.MODEL}"
    headers = {"Authorization": f"Bearer {token}"}
    out: dict[str, float] = {}
    with httpx.Client(headers=headers, timeout=300) as client:
        t0 = time.perf_counter()
        for lo in range(0, len(day), 10_000):
            r = client.post(f"{url}/predictions", json={"predictions": day[lo : lo + 10_000]})
            r.raise_for_status()
        out["bulk_rows_s"] = len(day) / (time.perf_counter() - t0)
    sent, stop = [0] * 8, time.monotonic() + 10.0

    def writer(k: int) -> None:
        with httpx.Client(headers=headers, timeout=60) as c:
            i = 0
            while time.monotonic() < stop:
                batch = [
                    dict(day[(i * 20 + j) % len(day)], id=f"small-{k}-{i}-{j}") for j in range(20)
                ]
                c.post(f"{url}/predictions", json={"predictions": batch}).raise_for_status()
                sent[k] += 20
                i += 1

    threads = [threading.Thread(target=writer, args=(k,)) for k in range(8)]
    t0 = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    out["small_rows_s"] = sum(sent) / (time.perf_counter() - t0)
    # labels for orders of the last 60 days of the year (or the last label_rows orders), as
    # many as the day's predictions
    rng = np.random.default_rng(3)
    lo_i = max(0, n - label_rows) if label_rows else recent_start(n)
    picks = rng.choice(np.arange(lo_i, n), size=min(len(day), n - lo_i), replace=False)
    items = [{"id": wd.pid(int(i)), "actual": "1" if i % 7 == 0 else "0"} for i in picks]
    with httpx.Client(headers=headers, timeout=300) as client:
        t0 = time.perf_counter()
        for lo in range(0, len(items), 10_000):
            r = client.post(f"{url}/labels", json={"labels": items[lo : lo + 10_000]})
            r.raise_for_status()
        out["label_rows_s"] = len(items) / (time.perf_counter() - t0)
    return out


def metrics_latency(sa_url: str, token: str) -> tuple[float, float]:
    """p50 and p95 ms of the 365-day metrics query on a fresh service."""
    service = Service(sa_url, extra_env={"BELATED_LOG_FORMAT": "text"})
    try:
        service.wait_ready()
        times, _, _ = latency(service, token, n=30)
    finally:
        service.stop()
    return percentile(times, 0.5) * 1000, percentile(times, 0.95) * 1000


def ingest_token(sa_url: str) -> str:
    """A token with the ingest scope for the bench's project."""
    from belated.store import keys
    from belated.store.db import make_engine, make_sessionmaker, transaction

    engine = make_engine(sa_url)
    with transaction(make_sessionmaker(engine)) as session:
        project = keys.get_or_create_project(session=session, name="furniture-shop")
        _, token = keys.create(session=session, project_id=project.id, scopes=["ingest"])
    engine.dispose()
    return token


def drop_old_days(sa_url: str, model_id: int, keep_days: int) -> dict[str, Any]:
    """Retention as the jobs run it, at the end of the new day."""
    from belated.store import raw_retention  # type: ignore[attr-defined]
    from belated.store.db import make_engine, make_sessionmaker, transaction
    from belated.store.tables import ModelRow

    engine = make_engine(sa_url)
    with transaction(make_sessionmaker(engine)) as session:
        model = session.get(ModelRow, model_id)
        assert model is not None
        model.keep_raw_days = float(keep_days)
        session.flush()
        done = raw_retention.drop_raw_days(
            session=session, model=model, now=NEW_DAY + timedelta(days=1)
        )
    engine.dispose()
    return dict(done)


def run_size(
    n: int, keep_days: int, match_only: bool = False, label_rows: int = 0
) -> dict[str, Any]:
    """Every measurement at one size, in a database of its own (only the load and the label
    look-ups with `match_only`)."""
    res: dict[str, Any] = {"rows": n}
    name = create_database("belated_bench_scale")
    url = pg_url(name)
    sa_url = url.replace("postgresql://", "postgresql+psycopg://")
    try:
        model_id, read_token = wd.setup_tenant(sa_url)
        token = ingest_token(sa_url)
        t0 = time.perf_counter()
        data = wd.generate(n)
        wd.load(url, model_id, data)
        res["load_s"] = time.perf_counter() - t0
        print({k: v for k, v in res.items() if k != "rebuild"}, flush=True)
        if not match_only:  # the look-ups read raw rows only
            res["rebuild"], _ = run_child("rebuild", sa_url, model_id)
        res["disk"] = disk(url)
        print({k: v for k, v in res.items() if k != "rebuild"}, flush=True)
        res["match"] = match(url, model_id, n)
        print({k: v for k, v in res.items() if k != "rebuild"}, flush=True)
        if match_only:
            return res
        day = new_day()
        res["warm_s"] = warm(url, model_id, n, flat=False)
        service = Service(sa_url, extra_env={"BELATED_LOG_FORMAT": "text"})
        try:
            service.wait_ready()
            res["http"] = http_day(service, token, n, day, label_rows)
            print(res["http"], flush=True)
        finally:
            service.stop()
        res["refresh"], _ = run_child("refresh", sa_url, model_id)
        print({k: v for k, v in res.items() if k != "rebuild"}, flush=True)
        res["p50"], res["p95"] = metrics_latency(sa_url, read_token)
        print({k: v for k, v in res.items() if k != "rebuild"}, flush=True)
        res["retention"] = drop_old_days(sa_url, model_id, keep_days)
        print({k: v for k, v in res.items() if k != "rebuild"}, flush=True)
        with psycopg.connect(url, autocommit=True) as conn:
            conn.execute("VACUUM (ANALYZE)")
        res["disk_after"] = disk(url)
        res["p50_after"], res["p95_after"] = metrics_latency(sa_url, read_token)
    finally:
        drop_database(name)
    return res


def _ratio(m: dict[str, float], key: str) -> str:
    reg, flat = m[f"registry_{key}"], m[f"flat_{key}"]
    return f"{reg:.1f}/{flat:.1f} ({reg / flat:.1f}×)"


def table(results: list[dict[str, Any]]) -> str:
    """The figures of every size, one row each, and the largest size against the smallest."""
    head = [
        "rows",
        "load s",
        "disk MiB (preds/registry)",
        "match 1000 ids, last 60 d: ms reg/flat (×)",
        "match 20 ids, last 60 d: ms reg/flat (×)",
        "match 1000 / 20 ids, whole year: ms reg/flat (×)",
        "by id across partitions, 1000 ids ms",
        "HTTP bulk preds rows/s",
        "HTTP 20-pred req rows/s",
        "HTTP labels rows/s",
        "refresh of the day s",
        "metrics 365 d p50/p95 ms",
        "after retention: disk MiB, p50/p95 ms",
    ]
    body = []
    for r in results:
        m, h, d, a = r["match"], r["http"], r["disk"], r["disk_after"]
        body.append(
            [
                f"{r['rows']:,}",
                f"{r['load_s']:.0f}",
                f"{d['db']:,.0f} ({d['predictions']:,.0f}/{d['registry']:,.0f})",
                _ratio(m, "1000_60d"),
                _ratio(m, "20_60d"),
                f"{_ratio(m, '1000_year')}; {_ratio(m, '20_year')}",
                f"{m['scan_1000_60d']:.0f}",
                f"{h['bulk_rows_s']:,.0f}",
                f"{h['small_rows_s']:,.0f}",
                f"{h['label_rows_s']:,.0f}",
                f"{r['refresh']['seconds']:.1f}",
                f"{r['p50']:.0f}/{r['p95']:.0f}",
                f"{a['db']:,.0f}, {r['p50_after']:.0f}/{r['p95_after']:.0f}",
            ]
        )
    return markdown_table(head, body)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", default="1000000,5000000")
    parser.add_argument("--keep-days", type=int, default=90)
    parser.add_argument(
        "--match-only", action="store_true", help="load and measure the label look-ups only"
    )
    parser.add_argument(
        "--label-rows",
        type=int,
        default=0,
        help="draw the HTTP labels from the last N orders instead of the last 60 days (the"
        " same N at every size keeps the labels as dense in the table)",
    )
    args = parser.parse_args()
    results = []
    for n in (int(s) for s in args.sizes.split(",")):
        results.append(run_size(n, args.keep_days, args.match_only, args.label_rows))
        print(results[-1], flush=True)
    print(match_table(results) if args.match_only else table(results))


def match_table(results: list[dict[str, Any]]) -> str:
    """The label look-up figures of every size (`--match-only`)."""
    head = ["rows", "load s", "disk MiB (preds/registry)"] + [
        f"match {size} ids, {span}: ms reg/flat (×)"
        for span in ("last 60 d", "whole year")
        for size in (1000, 20)
    ]
    body = []
    for r in results:
        m, d = r["match"], r["disk"]
        body.append(
            [
                f"{r['rows']:,}",
                f"{r['load_s']:.0f}",
                f"{d['db']:,.0f} ({d['predictions']:,.0f}/{d['registry']:,.0f})",
                *(_ratio(m, f"{size}_{span}") for span in ("60d", "year") for size in (1000, 20)),
            ]
        )
    return markdown_table(head, body)


if __name__ == "__main__":
    main()
