"""Ingest throughput on PostgreSQL: the HTTP API against COPY and executemany in the same run.

Sends N binary predictions (score and two tags: an online furniture shop predicting returns,
tagged by channel and region) in batches over HTTP to a `belated serve --no-jobs` subprocess,
then writes the same rows into tables of the same shape (same columns, unique key and
indexes; no foreign key, like the service's) with psycopg COPY and with executemany; then
the same for N labels (the HTTP labels endpoint, COPY into a staging table + UPDATE ... FROM,
executemany UPDATE). Every path commits once per batch and runs with the same number of
concurrent clients (forked processes, each with its own connection). JSON bodies and row
tuples are built before the clock starts.

    .venv/bin/python bench/ingest.py [--rows 1000000] [--batch 10000] [--clients 2] [--workers 1]
        [--random-page-cost 1.1] [--profile DIR]   (py-spy collapsed stacks of the service)
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import random
import sys
import time
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import orjson
import psycopg

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from bench.common import (  # noqa: E402
    PG_ADMIN,
    Service,
    backend_pids,
    code_version,
    cpu_seconds,
    create_database,
    drop_database,
    markdown_table,
    percentile,
    pg_url,
    setup_store,
    start_profiler,
    stop_profiler,
    tree_cpu_seconds,
    tree_peak_rss_mib,
)

MODEL = "returns-bench"
CHANNELS = ("web", "app", "phone")
REGIONS = ("north", "south", "east", "west")
PRED_COLS = ("model_id", "pid", "ts", "hour", "score", "predicted", "tags", "received_at")
INSERT_PRED = (
    "INSERT INTO {t} (model_id, pid, ts, hour, score, predicted, tags, received_at)"
    " VALUES (%s, %s, %s, %s, %s, %s, %s::jsonb, %s)"
)
UPDATE_LABEL = (
    "UPDATE {t} SET actual = %s, label_ts = %s, delay_h = %s WHERE model_id = %s AND pid = %s"
)
STAGE_DDL = (
    "CREATE TEMP TABLE bench_stage (pid text, actual text, label_ts timestamptz, delay_h float8)"
    " ON COMMIT DELETE ROWS"
)
UPDATE_FROM_STAGE = (
    "UPDATE {t} p SET actual = s.actual, label_ts = s.label_ts, delay_h = s.delay_h"
    " FROM bench_stage s WHERE p.model_id = %s AND p.pid = s.pid"
)


@dataclass
class Workload:
    """Everything the clients send, prepared before timing (inherited by forked clients)."""

    pred_bodies: list[bytes]
    label_bodies: list[bytes]
    pred_rows: list[list[tuple[Any, ...]]]  # per batch, in PRED_COLS order
    label_rows: list[list[tuple[Any, ...]]]  # per batch: actual, label_ts, delay_h, pid


# Set in the parent before forking the clients of a phase; read by _client.
_JOB: dict[str, Any] = {}


def iso_z(dt: datetime) -> str:
    """RFC 3339 in UTC with a Z, as a live system would send it."""
    return dt.strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def build_workload(rows: int, batch: int, model_id: int, seed: int) -> Workload:
    """Seeded predictions spread over the last 14 days and one label for each."""
    rng = random.Random(seed)
    now = datetime.now(UTC).replace(microsecond=0)
    start = now - timedelta(days=14)
    received = now
    w = Workload([], [], [], [])
    for b0 in range(0, rows, batch):
        preds, labs, prow, lrow = [], [], [], []
        for i in range(b0, min(b0 + batch, rows)):
            pid = f"ord-{i:08d}"
            ts = start + timedelta(seconds=rng.randrange(14 * 86400 - 3600))
            score = round(rng.random(), 6)
            tags = {"channel": rng.choice(CHANNELS), "region": rng.choice(REGIONS)}
            # Outcome known 1 hour to 20 days later, never after now (no future labels).
            lts = min(ts + timedelta(seconds=rng.randrange(3600, 20 * 86400)), now)
            actual = "1" if rng.random() < score else "0"
            preds.append({"id": pid, "ts": iso_z(ts), "score": score, "tags": tags})
            labs.append({"id": pid, "actual": actual, "ts": iso_z(lts)})
            prow.append(
                (
                    model_id,
                    pid,
                    ts,
                    int(ts.timestamp() // 3600),
                    score,
                    "1" if score >= 0.5 else "0",
                    orjson.dumps(tags).decode(),
                    received,
                )
            )
            lrow.append((actual, lts, max(0.0, (lts - ts).total_seconds() / 3600.0), pid))
        w.pred_bodies.append(orjson.dumps({"predictions": preds}))
        w.label_bodies.append(orjson.dumps({"labels": labs}))
        w.pred_rows.append(prow)
        w.label_rows.append(lrow)
    return w


def _backend_cpu(conn: psycopg.Connection[Any]) -> float:
    return cpu_seconds(conn.info.backend_pid)


def _send(kind: str, body: bytes, client: httpx.Client) -> int:
    resp = client.post(
        f"/v1/models/{MODEL}/{kind}", content=body, headers={"content-type": "application/json"}
    )
    if resp.status_code != 200:
        raise RuntimeError(f"{kind}: HTTP {resp.status_code}: {resp.text[:500]}")
    answer = resp.json()
    return int(answer["accepted"] if kind == "predictions" else answer["matched"])


def _client(k: int) -> dict[str, Any]:
    """One client: its share of the batches (k, k+C, ...) by the phase's method."""
    job, w = _JOB, _JOB["workload"]
    mine = range(k, len(w.pred_rows), job["clients"])
    lat: list[float] = []
    done = 0
    db_cpu = 0.0
    conn: psycopg.Connection[Any] | None = None
    http: httpx.Client | None = None
    method, kind, table, model_id = job["method"], job["kind"], job["table"], job["model_id"]
    if method == "http":
        http = httpx.Client(
            base_url=job["url"], timeout=300.0, headers={"Authorization": f"Bearer {job['token']}"}
        )
    else:
        # the service's session settings (store/db.py): neither side pays for JIT
        conn = psycopg.connect(job["db_url"], options="-c jit=off")
        if method == "copy" and kind == "labels":
            conn.execute(STAGE_DDL)
            conn.commit()
        db_cpu = -_backend_cpu(conn)
    job["barrier"].wait(timeout=300)
    cpu0 = time.process_time()
    t_start = time.perf_counter()
    for b in mine:
        t0 = time.perf_counter()
        if http is not None:
            done += _send(
                kind, (w.pred_bodies if kind == "predictions" else w.label_bodies)[b], http
            )
        else:
            assert conn is not None
            done += _write(conn, method, kind, table, model_id, w, b)
        lat.append(time.perf_counter() - t0)
    t_end = time.perf_counter()
    cpu = time.process_time() - cpu0
    if conn is not None:
        db_cpu += _backend_cpu(conn)
        conn.close()
    if http is not None:
        http.close()
    return {
        "start": t_start,
        "end": t_end,
        "lat": lat,
        "done": done,
        "client_cpu": cpu,
        "db_cpu": db_cpu,
    }


def _write(
    conn: psycopg.Connection[Any],
    method: str,
    kind: str,
    table: str,
    model_id: int,
    w: Workload,
    b: int,
) -> int:
    """One batch straight into PostgreSQL, committed on its own like an API request."""
    with conn.cursor() as cur:
        if kind == "predictions":
            rows = w.pred_rows[b]
            if method == "copy":
                with cur.copy(f"COPY {table} ({', '.join(PRED_COLS)}) FROM STDIN") as cp:
                    for row in rows:
                        cp.write_row(row)
            else:
                cur.executemany(INSERT_PRED.format(t=table), rows)
        else:
            rows = w.label_rows[b]
            if method == "copy":
                with cur.copy("COPY bench_stage (actual, label_ts, delay_h, pid) FROM STDIN") as cp:
                    for row in rows:
                        cp.write_row(row)
                cur.execute(UPDATE_FROM_STAGE.format(t=table), (model_id,))
            else:
                cur.executemany(
                    UPDATE_LABEL.format(t=table),
                    [(a, lts, d, model_id, pid) for a, lts, d, pid in rows],
                )
    conn.commit()
    return len(rows)


def run_phase(job: dict[str, Any], service: Service, dbname: str) -> dict[str, Any]:
    """Run one method with C forked clients; wall time from the first start to the last end."""
    ctx = mp.get_context("fork")
    _JOB.clear()
    _JOB.update(job, barrier=ctx.Barrier(job["clients"]))
    svc_cpu0 = tree_cpu_seconds(service.pid)
    pg0 = {p: cpu_seconds(p) for p in backend_pids(dbname)} if job["method"] == "http" else {}
    with ctx.Pool(job["clients"]) as pool:
        parts = pool.map(_client, range(job["clients"]))
    end = max(p["end"] for p in parts)
    lag = 0.0
    if job["method"] == "http":
        # A 2xx must mean stored: the clock stops only when every acknowledged row is
        # visible to another connection (an answer sent before the commit would flatter).
        committed = wait_committed(job["db_url"], job["model_id"], job["kind"], job["expected"])
        lag = max(0.0, committed - end)
        end = max(end, committed)
    wall = end - min(p["start"] for p in parts)
    svc_cpu = tree_cpu_seconds(service.pid) - svc_cpu0
    if job["method"] == "http":  # the service's pooled connections stay open between requests
        db_cpu = sum(cpu_seconds(p) - pg0.get(p, 0.0) for p in backend_pids(dbname))
    else:
        svc_cpu = 0.0
        db_cpu = sum(p["db_cpu"] for p in parts)
    lat = [x for p in parts for x in p["lat"]]
    return {
        "method": job["method"],
        "kind": job["kind"],
        "rows": sum(p["done"] for p in parts),
        "wall": wall,
        "lat": lat,
        "client_cpu": sum(p["client_cpu"] for p in parts),
        "service_cpu": svc_cpu,
        "db_cpu": db_cpu,
        "commit_lag": lag,
    }


def wait_committed(db_url: str, model_id: int, kind: str, expected: int) -> float:
    """perf_counter time by which `expected` predictions (or labels) were committed.

    That is the start of the first count, on another connection, that sees them all; a
    service that commits before answering passes at the first count.
    """
    sql = (
        "SELECT count(*) FROM predictions WHERE model_id = %s"
        if kind == "predictions"
        else "SELECT count(actual) FROM predictions WHERE model_id = %s"
    )
    deadline = time.perf_counter() + 120
    with psycopg.connect(db_url, autocommit=True) as conn:
        while True:
            started = time.perf_counter()
            n = conn.execute(sql, (model_id,)).fetchone()[0]  # type: ignore[index]
            if n >= expected:
                return started
            if started > deadline:
                raise RuntimeError(f"only {n} of {expected} {kind} committed after 120 s")
            time.sleep(0.02)


def wait_model(db_url: str) -> int:
    """The new model's id, once its creation is committed (it may lag the 201)."""
    with psycopg.connect(db_url, autocommit=True) as conn:
        for _ in range(500):
            row = conn.execute("SELECT id FROM models WHERE name = %s", (MODEL,)).fetchone()
            if row is not None:
                return int(row[0])
            time.sleep(0.01)
    raise RuntimeError("the model was answered 201 but never became visible")


def make_tables(db_url: str) -> None:
    """Two tables shaped like `predictions` (the COPY and the executemany targets)."""
    with psycopg.connect(db_url, autocommit=True) as conn:
        for t in ("bench_copy", "bench_many"):
            conn.execute(f"CREATE TABLE {t} (LIKE predictions INCLUDING ALL)")
            conn.execute(f"CREATE SEQUENCE {t}_seq OWNED BY {t}.row_id")
            conn.execute(f"ALTER TABLE {t} ALTER COLUMN row_id SET DEFAULT nextval('{t}_seq')")
            # no foreign key, as the service's table since migration 0021


def report(results: list[dict[str, Any]], kind: str) -> str:
    """The markdown table of one kind: rate, ratios, batch latencies, CPU seconds."""
    by = {r["method"]: r for r in results if r["kind"] == kind}
    names = {
        "predictions": ("HTTP POST /predictions", "COPY", "executemany INSERT"),
        "labels": ("HTTP POST /labels", "COPY + UPDATE ... FROM", "executemany UPDATE"),
    }
    copy_rate = by["copy"]["rows"] / by["copy"]["wall"]
    many_rate = by["many"]["rows"] / by["many"]["wall"]
    rows = []
    for method, name in zip(("http", "copy", "many"), names[kind], strict=True):
        r = by[method]
        rate = r["rows"] / r["wall"]
        rows.append(
            [
                name,
                f"{r['rows']:,}",
                f"{r['wall']:.1f}",
                f"{rate:,.0f}",
                f"{rate / copy_rate:.2f}x",
                f"{rate / many_rate:.2f}x",
                f"{percentile(r['lat'], 0.5) * 1000:.0f}",
                f"{percentile(r['lat'], 0.95) * 1000:.0f}",
                f"{max(r['lat']) * 1000:.0f}",
                f"{r['service_cpu']:.1f}" if method == "http" else "-",
                f"{r['db_cpu']:.1f}",
                f"{r['client_cpu']:.1f}",
                f"{r['rows'] / cpu_total(r):,.0f}",
            ]
        )
    headers = [
        "path",
        "rows",
        "s",
        "rows/s",
        "vs COPY",
        "vs executemany",
        "batch p50 ms",
        "p95 ms",
        "max ms",
        "service CPU s",
        "postgres CPU s",
        "client CPU s",
        "rows per CPU s",
    ]
    return markdown_table(headers, rows)


def cpu_total(r: dict[str, Any]) -> float:
    """CPU seconds a path cost: service process, its PostgreSQL backends, the clients."""
    return float(r["service_cpu"] + r["db_cpu"] + r["client_cpu"])


def verdict(results: list[dict[str, Any]], kind: str, target: float) -> str:
    """Whether HTTP met the absolute and the relative target, and its CPU-bound ceiling."""
    by = {r["method"]: r for r in results if r["kind"] == kind}
    http = by["http"]["rows"] / by["http"]["wall"]
    share = http / (by["copy"]["rows"] / by["copy"]["wall"])
    ok_abs, ok_rel = http >= target, share >= 0.60
    ceiling = by["http"]["rows"] / cpu_total(by["http"]) * mp.cpu_count()
    return (
        f"{kind}: HTTP {http:,.0f} rows/s vs target {target:,.0f}: "
        f"{'met' if ok_abs else 'MISSED'}; {share:.0%} of COPY vs target 60%: "
        f"{'met' if ok_rel else 'MISSED'}; at its measured CPU cost per row, "
        f"{mp.cpu_count()} idle cores would allow at most {ceiling:,.0f} rows/s"
    )


def check_counts(db_url: str, model_id: int, rows: int) -> list[str]:
    """Every path stored every row and every label; a shortfall is reported, not hidden."""
    problems = []
    with psycopg.connect(db_url) as conn:
        for table in ("predictions", "bench_copy", "bench_many"):
            n, labelled = conn.execute(
                f"SELECT count(*), count(actual) FROM {table} WHERE model_id = %s", (model_id,)
            ).fetchone() or (0, 0)
            if n != rows or labelled != rows:
                problems.append(f"{table}: {n} rows, {labelled} labelled, expected {rows}")
    return problems


def main() -> int:
    """Run the benchmark and print the tables."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--batch", type=int, default=10_000)
    ap.add_argument("--clients", type=int, default=2, help="concurrent clients (processes)")
    ap.add_argument(
        "--workers", type=int, default=1, help="API processes of the service (serve --workers)"
    )
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument(
        "--random-page-cost",
        type=float,
        default=None,
        help="set random_page_cost on the benchmark database (default: the server's)",
    )
    ap.add_argument(
        "--profile",
        type=Path,
        default=None,
        help="directory for py-spy collapsed stacks of the service (slows it)",
    )
    args = ap.parse_args()

    dbname = create_database("belated_bench")
    db_url = pg_url(dbname)
    service: Service | None = None
    try:
        if args.random_page_cost is not None:
            with psycopg.connect(PG_ADMIN, autocommit=True) as conn:
                conn.execute(
                    f'ALTER DATABASE "{dbname}" SET random_page_cost = '
                    f"{float(args.random_page_cost)}"
                )
        with psycopg.connect(db_url) as conn:
            rpc = conn.execute("SHOW random_page_cost").fetchone()[0]  # type: ignore[index]
        load0 = os.getloadavg()
        token, _project = setup_store(db_url)
        service = Service(db_url, workers=args.workers)
        service.wait_ready()
        resp = httpx.post(
            service.url + "/v1/models",
            json={"name": MODEL, "kind": "binary"},
            headers={"Authorization": f"Bearer {token}"},
            timeout=30,
        )
        resp.raise_for_status()
        model_id = wait_model(db_url)
        make_tables(db_url)
        t0 = time.perf_counter()
        work = build_workload(args.rows, args.batch, model_id, args.seed)
        prep = time.perf_counter() - t0
        body_mb = sum(map(len, work.pred_bodies)) / len(work.pred_bodies) / 2**20
        label_mb = sum(map(len, work.label_bodies)) / len(work.label_bodies) / 2**20
        base = {
            "clients": args.clients,
            "expected": args.rows,
            "workload": work,
            "url": service.url,
            "token": token,
            "db_url": db_url,
            "model_id": model_id,
        }
        results: list[dict[str, Any]] = []
        rss: dict[str, float] = {}
        for kind in ("predictions", "labels"):
            if kind == "labels":  # fresh statistics for all three, as autovacuum would leave them
                with psycopg.connect(db_url, autocommit=True) as conn:
                    conn.execute("ANALYZE predictions, bench_copy, bench_many")
            for method, table in (
                ("http", "predictions"),
                ("copy", "bench_copy"),
                ("many", "bench_many"),
            ):
                spy = None
                if method == "http" and args.profile is not None:
                    args.profile.mkdir(parents=True, exist_ok=True)
                    spy = start_profiler(service.pid, args.profile / f"{kind}.txt")
                results.append(
                    run_phase(
                        {**base, "method": method, "kind": kind, "table": table}, service, dbname
                    )
                )
                if spy is not None:
                    stop_profiler(spy)
                if method == "http":
                    rss[kind] = tree_peak_rss_mib(service.pid)
                print(
                    f"  done: {kind} via {method}: {results[-1]['wall']:.1f} s",
                    file=sys.stderr,
                    flush=True,
                )
        problems = check_counts(db_url, model_id, args.rows)
        load1 = os.getloadavg()

        print(f"# belated ingest benchmark ({datetime.now(UTC):%Y-%m-%d %H:%M} UTC)\n")
        print(f"- code: {code_version()}")
        print(
            f"- {args.rows:,} rows in batches of {args.batch:,}; {args.clients} concurrent "
            "client process(es) on every path, each with its own HTTP or database connection;"
            " one transaction per batch on every path"
        )
        print(
            f"- service: `belated serve --no-jobs` ({args.workers} API process(es)) on PostgreSQL "
            f"127.0.0.1:5432; request bodies pre-serialised with orjson "
            f"({body_mb:.2f} MiB per predictions batch, {label_mb:.2f} MiB per labels batch;"
            f" preparing the workload took {prep:.1f} s, untimed)"
        )
        print(
            "- COPY / executemany write into tables shaped like `predictions` (columns, "
            "unique (model_id, pid), indexes; no foreign key); labels update those rows"
        )
        print(
            "- service peak RSS (VmHWM, summed over its processes): "
            f"{rss['predictions']:.0f} MiB after predictions, {rss['labels']:.0f} MiB after labels"
        )
        print(
            "- CPU seconds: service process(es), PostgreSQL backends of the path, client "
            "processes (not counted: parallel query workers, autovacuum, WAL writer, "
            f"checkpointer); the machine has {mp.cpu_count()} cores"
            + ("; the service was sampled by py-spy (figures are slowed)" if args.profile else "")
        )
        print(
            f"- PostgreSQL random_page_cost {rpc} for this database"
            + (
                " (set by --random-page-cost)"
                if args.random_page_cost is not None
                else " (the server's setting)"
            )
            + "; the three tables are ANALYZEd between the predictions and the labels phases"
        )
        print(
            f"- 1-minute load average {load0[0]:.1f} at the start and {load1[0]:.1f} at the end "
            "(other work on this machine inflates every figure; compare within a run)"
        )
        for kind in ("predictions", "labels"):
            print(f"\n## {kind}\n")
            print(report(results, kind))
        print()
        lags = {r["kind"]: r["commit_lag"] for r in results if r["method"] == "http"}
        print(
            "- HTTP wall time runs until another connection sees every acknowledged row: "
            "the first count that saw them all started "
            f"{lags['predictions'] * 1000:.0f} ms (predictions) and "
            f"{lags['labels'] * 1000:.0f} ms (labels) after the last answer"
        )
        for kind in ("predictions", "labels"):
            print("- " + verdict(results, kind, 50_000))
        if problems:
            print("- COUNT CHECK FAILED: " + "; ".join(problems))
            return 1
        print(f"- count check: every path stored {args.rows:,} predictions and labelled all")
        return 0
    except Exception:
        if service is not None:
            print(service.log_tail(), file=sys.stderr)
        raise
    finally:
        if service is not None:
            service.stop()
        drop_database(dbname)


if __name__ == "__main__":
    sys.exit(main())
