"""The live path: many writers posting small requests, belated against a plain insert endpoint.

A live system posts each prediction as it makes it, or a handful at a time, from many
threads. This runs `belated serve` (one process, jobs off) and the plain alternative
(bench/plain_app.py: a FastAPI endpoint on the same server stack that INSERTs the same rows
with psycopg or sqlite3 and does nothing else) one after the other on the same store kind,
and drives each with the same client: `--writers` threads spread over `--procs` processes,
each thread with its own keep-alive connection, posting `--rows` predictions a request
(an online furniture shop scoring orders for return risk; ids unique, timestamps now) for
`--seconds` in all, split into `--rounds` alternating rounds. Latency is per request, client
side; rates are the median of the rounds; server CPU is that of the serving processes
(every one of --workers).

    .venv/bin/python bench/live.py [--seconds 60] [--writers 16] [--rows 1,20]
        [--stores postgresql,sqlite] [--procs 4] [--workers 1]
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import os
import random
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import orjson

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
from bench.common import (  # noqa: E402
    Service,
    backend_pids,
    code_version,
    cpu_seconds,
    create_database,
    drop_database,
    free_port,
    markdown_table,
    percentile,
    pg_url,
    setup_store,
    tree_cpu_seconds,
)

MODEL = "returns-live"
REGIONS = ("north", "south", "east", "west")
LABELLED_PER_WRITER = 6000  # predictions stored before the labels run, per writer and round


def _prediction(rng: random.Random, pid: str, ts: str) -> dict[str, Any]:
    return {
        "id": pid,
        "ts": ts,
        "score": round(rng.random(), 4),
        "tags": {"region": rng.choice(REGIONS)},
    }


def _writer(
    url: str, token: str, kind: str, rows: int, seconds: float, tag: str, out: list[Any]
) -> None:
    """Post `rows` predictions (or labels) a request for `seconds`; labels are for
    predictions this writer stored first, untimed (returns known within a day)."""
    rng = random.Random(tag)
    headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/json"}
    path = f"/v1/models/{MODEL}/{kind}"
    seq = 0
    with httpx.Client(base_url=url, headers=headers, timeout=60.0) as client:
        if kind == "labels":
            day_ago = (datetime.now(UTC) - timedelta(days=1)).isoformat()
            for start in range(0, LABELLED_PER_WRITER, 1000):
                items = [
                    _prediction(rng, f"{tag}-{i}", day_ago) for i in range(start, start + 1000)
                ]
                r = client.post(
                    f"/v1/models/{MODEL}/predictions", content=orjson.dumps({"predictions": items})
                )
                assert r.status_code == 200, r.text
        t0 = time.monotonic()
        deadline = t0 + seconds
        while time.monotonic() < deadline:
            ts = datetime.now(UTC).isoformat()
            items = []
            for _ in range(rows):
                seq += 1
                if kind == "labels":  # past the stored ones, ids wait as pending labels
                    items.append({"id": f"{tag}-{seq}", "actual": rng.choice("01"), "ts": ts})
                else:
                    items.append(_prediction(rng, f"{tag}-{seq}", ts))
            body = orjson.dumps({kind: items})
            start = time.perf_counter()
            try:
                status = client.post(path, content=body).status_code
            except httpx.HTTPError:
                status = 0
            out.append((status, time.perf_counter() - start, rows))
        out.append(("span", t0, time.monotonic()))


def _process(
    url: str, token: str, kind: str, rows: int, seconds: float, threads: int, pidx: int, q: Any
) -> None:
    results: list[list[Any]] = [[] for _ in range(threads)]
    workers = [
        threading.Thread(
            target=_writer,
            args=(
                url,
                token,
                kind,
                rows,
                seconds,
                f"p{pidx}t{i}r{rows}-{time.time_ns()}",
                results[i],
            ),
        )
        for i in range(threads)
    ]
    for w in workers:
        w.start()
    for w in workers:
        w.join()
    q.put([r for rs in results for r in rs])


def drive(
    url: str, token: str, kind: str, rows: int, seconds: float, writers: int, procs: int
) -> dict[str, Any]:
    """Run the writers against one endpoint; return the figures."""
    ctx = mp.get_context("fork")
    q = ctx.Queue()
    per = [writers // procs + (1 if i < writers % procs else 0) for i in range(procs)]
    ps = [
        ctx.Process(target=_process, args=(url, token, kind, rows, seconds, n, i, q))
        for i, n in enumerate(per)
        if n
    ]
    for p in ps:
        p.start()
    everything = [r for _ in ps for r in q.get()]
    for p in ps:
        p.join()
    spans = [r for r in everything if r[0] == "span"]
    got = [r for r in everything if r[0] != "span"]
    elapsed = max(s[2] for s in spans) - min(s[1] for s in spans)  # the timed part only
    lat = [r[1] * 1000 for r in got]
    ok = [r for r in got if 200 <= r[0] < 300]
    return {
        "requests": len(got),
        "req_s": len(ok) / elapsed,
        "rows_s": sum(r[2] for r in ok) / elapsed,
        "p50": percentile(lat, 0.5),
        "p95": percentile(lat, 0.95),
        "p99": percentile(lat, 0.99),
        "errors": Counter(str(r[0] or "no answer") for r in got if not 200 <= r[0] < 300),
        "lat": lat,
    }


class Plain:
    """bench/plain_app.py under uvicorn in a subprocess."""

    def __init__(self, dsn: str, workers: int) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        uvicorn = ROOT / ".venv" / "bin" / "uvicorn"
        self.proc = subprocess.Popen(
            [
                str(uvicorn),
                "bench.plain_app:app",
                "--host",
                "127.0.0.1",
                "--port",
                str(self.port),
                "--log-level",
                "warning",
                "--no-access-log",
                "--workers",
                str(workers),
            ],
            cwd=ROOT,
            env={**os.environ, "PLAIN_DSN": dsn},
        )
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            try:
                httpx.get(self.url + "/docs", timeout=1.0)
                return
            except httpx.HTTPError:
                time.sleep(0.2)
        raise RuntimeError("the plain endpoint did not start")

    def stop(self) -> None:
        """Stop it."""
        self.proc.terminate()
        self.proc.wait(20)


def _store_cpu(dbname: str | None) -> dict[int, float]:
    """CPU seconds so far of the PostgreSQL backends serving `dbname` (none for SQLite)."""
    if dbname is None:
        return {}
    out = {}
    for pid in backend_pids(dbname):
        try:
            out[pid] = cpu_seconds(pid)
        except OSError:  # gone meanwhile
            pass
    return out


def _phase(
    target: Any, pid: int, dbname: str | None, token: str, rows: int, args: argparse.Namespace
) -> dict[str, Any]:
    cpu0, store0 = tree_cpu_seconds(pid), _store_cpu(dbname)  # every API process of --workers
    m = drive(target, token, args.kind, rows, args.seconds / args.rounds, args.writers, args.procs)
    m["cpu"] = tree_cpu_seconds(pid) - cpu0
    m["store_cpu"] = sum(v - store0.get(k, 0.0) for k, v in _store_cpu(dbname).items())
    return m


def _merge(parts: list[dict[str, Any]]) -> dict[str, Any]:
    """Figures of several rounds: medians of the rates, latencies over every request."""
    lat = [x for p in parts for x in p["lat"]]
    errors: Counter[str] = Counter()
    for p in parts:
        errors.update(p["errors"])
    n = sum(p["requests"] for p in parts)
    return {
        "requests": n,
        "req_s": statistics.median(p["req_s"] for p in parts),
        "rows_s": statistics.median(p["rows_s"] for p in parts),
        "p50": percentile(lat, 0.5),
        "p95": percentile(lat, 0.95),
        "p99": percentile(lat, 0.99),
        "errors": errors,
        "cpu_ms": sum(p["cpu"] for p in parts) * 1000 / max(1, n),
        "store_ms": sum(p["store_cpu"] for p in parts) * 1000 / max(1, n),
    }


def run_store(kind: str, args: argparse.Namespace, rows: int) -> list[list[Any]]:
    """belated and the plain endpoint side by side on fresh stores of one kind, driven in
    alternating rounds (so that a noisy neighbour hits both alike); two table rows."""
    tmp = Path(tempfile.mkdtemp(prefix="belated_live_"))
    if kind == "postgresql":
        names = [create_database("belated_live"), create_database("plain_live")]
        urls = [pg_url(n) for n in names]
        dbs: list[str | None] = list(names)
    else:
        dbs = [None, None]
        names = []
        urls = [f"sqlite:///{tmp / 'belated.db'}", f"sqlite:///{tmp / 'plain.db'}"]
    ours: list[dict[str, Any]] = []
    theirs: list[dict[str, Any]] = []
    try:
        token, _ = setup_store(urls[0])
        service = Service(
            urls[0].replace("postgresql://", "postgresql+psycopg://", 1), workers=args.workers
        )
        plain = Plain(urls[1], args.workers)
        try:
            service.wait_ready()
            r = httpx.post(
                service.url + "/v1/models",
                json={"name": MODEL},
                headers={"Authorization": f"Bearer {token}"},
                timeout=30,
            )
            assert r.status_code == 201, r.text
            for _ in range(args.rounds):
                ours.append(_phase(service.url, service.pid, dbs[0], token, rows, args))
                theirs.append(_phase(plain.url, plain.proc.pid, dbs[1], "none", rows, args))
        finally:
            service.stop()
            plain.stop()
    finally:
        for n in names:
            drop_database(n)
    m, p = _merge(ours), _merge(theirs)
    out: list[list[Any]] = []
    for who, x in (("belated", m), ("plain insert", p)):
        errors = ", ".join(f"{k}: {v}" for k, v in sorted(x["errors"].items())) or "none"
        out.append(
            [
                kind,
                rows,
                who,
                x["requests"],
                f"{x['req_s']:.0f}",
                f"{x['rows_s']:.0f}",
                f"{x['p50']:.1f}",
                f"{x['p95']:.1f}",
                f"{x['p99']:.1f}",
                errors,
                f"{x['cpu_ms']:.2f}",
                f"{x['store_ms']:.2f}" if kind == "postgresql" else "-",
                f"{x['rows_s'] / p['rows_s']:.2f}x",
            ]
        )
    return out


HEADERS = [
    "store",
    "rows/request",
    "endpoint",
    "requests",
    "requests/s (median of rounds)",
    "rows/s",
    "p50 ms",
    "p95 ms",
    "p99 ms",
    "errors",
    "server CPU ms/request",
    "PostgreSQL CPU ms/request",
    "rows/s vs plain",
]


def main() -> None:
    """Run every (store, rows) pair and print one table."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--writers", type=int, default=16)
    ap.add_argument("--procs", type=int, default=4)
    ap.add_argument("--rows", default="1,20")
    ap.add_argument("--stores", default="postgresql,sqlite")
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--rounds", type=int, default=3, help="alternating rounds per endpoint")
    ap.add_argument("--kind", choices=("predictions", "labels"), default="predictions")
    args = ap.parse_args()
    table: list[list[Any]] = []
    for kind in args.stores.split(","):
        for rows in (int(x) for x in args.rows.split(",")):
            table += run_store(kind, args, rows)
    print(
        f"\n{args.kind}: {args.writers} writers ({args.procs} client processes),"
        f" {args.seconds:.0f} s each,"
        f" {args.workers} API process(es); code {code_version()}\n"
    )
    print(markdown_table(HEADERS, table))


if __name__ == "__main__":
    main()
