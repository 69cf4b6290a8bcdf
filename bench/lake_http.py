"""The HTTP path of bench/lake.py: belated's own ingest and refresh on PostgreSQL.

Predictions and labels go to `belated serve --no-jobs` over loopback in bulk batches (10,000
items, two clients); labels in arrival order (a correction in a later request than the label
it corrects). The refresh (join pending labels, mark newly implied negatives, refresh every
dirty hour) runs in a child process with the clock set, as the job leader would run it:

    python -m bench.lake_http refresh SQLALCHEMY_URL ISO_NOW [SERVICE_BACKEND_PID ...]

prints one JSON line: wall s, its own CPU-s, the CPU-s of its PostgreSQL backends.
"""

from __future__ import annotations

import json
import sys
import threading
import time
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

import httpx
import numpy as np
import orjson
import pyarrow.parquet as pq

from bench.common import backend_pids, cpu_seconds, peak_rss_mib

BATCH = 10_000


def _stamps(column: Any) -> list[str]:
    us = column.cast("timestamp[us]").to_numpy(zero_copy_only=False)
    return [s + "Z" for s in np.datetime_as_string(us, unit="us").tolist()]


def prediction_bodies(path: str) -> list[bytes]:
    """JSON bodies of POST /predictions, BATCH items each."""
    t = pq.read_table(path)
    ids, ts = t.column("id").to_pylist(), _stamps(t.column("ts"))
    score = t.column("score").to_pylist()
    region, channel = t.column("region").to_pylist(), t.column("channel").to_pylist()
    items = [
        {"id": i, "ts": s, "score": p, "tags": {"region": r, "channel": c}}
        for i, s, p, r, c in zip(ids, ts, score, region, channel, strict=True)
    ]
    return [
        orjson.dumps({"predictions": items[i : i + BATCH]}) for i in range(0, len(items), BATCH)
    ]


def label_waves(path: str) -> list[list[bytes]]:
    """JSON bodies of POST /labels in waves: every id's first label in time order (wave 0),
    then its next (a correction), ...; a wave's requests may run concurrently."""
    t = pq.read_table(path).sort_by([("ts", "ascending")])
    ids, ts, actual = t.column("id").to_pylist(), _stamps(t.column("ts")), t.column("actual")
    seen: dict[str, int] = {}
    waves: list[list[dict[str, Any]]] = []
    for i, s, a in zip(ids, ts, actual.to_pylist(), strict=True):
        k = seen.get(i, 0)
        seen[i] = k + 1
        while len(waves) <= k:
            waves.append([])
        waves[k].append({"id": i, "actual": a, "ts": s})
    return [
        [orjson.dumps({"labels": w[i : i + BATCH]}) for i in range(0, len(w), BATCH)] for w in waves
    ]


def db_cpu(dbname: str) -> dict[int, float]:
    """CPU-s so far of every PostgreSQL backend connected to the database."""
    out = {}
    for pid in backend_pids(dbname):
        try:
            out[pid] = cpu_seconds(pid)
        except OSError:
            pass
    return out


def post_all(
    url: str, token: str, path: str, waves: list[list[bytes]], dbname: str, service_pid: int
) -> dict[str, float]:
    """Post the bodies wave by wave on two clients; wall s, the service's CPU-s and its
    backends' CPU-s (those that appeared during the run counted whole)."""
    headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/json"}
    local = threading.local()

    def post(body: bytes) -> None:
        if not hasattr(local, "client"):
            local.client = httpx.Client(base_url=url, headers=headers, timeout=600)
        r = local.client.post(path, content=body)
        if r.status_code >= 400:
            raise RuntimeError(f"{path}: {r.status_code} {r.text[:500]}")

    db0, svc0, w0 = db_cpu(dbname), cpu_seconds(service_pid), time.perf_counter()
    with ThreadPoolExecutor(2) as pool:
        for wave in waves:
            list(pool.map(post, wave))
    wall = time.perf_counter() - w0
    db1 = db_cpu(dbname)
    db = sum(c - db0.get(p, 0.0) for p, c in db1.items())
    return {"wall": wall, "cpu": cpu_seconds(service_pid) - svc0 + db, "db_cpu": db}


def run_refresh(sa_url: str, now_iso: str, dbname: str) -> dict[str, float]:
    """The refresh child at clock `now_iso`: wall, CPU-s (its own and its backends'), peak MiB."""
    import subprocess

    skip = [str(p) for p in backend_pids(dbname)]
    cmd = [sys.executable, "-m", "bench.lake_http", "refresh", sa_url, now_iso, *skip]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True)
    peak = _watch(proc.pid, lambda: proc.poll() is None)
    out, _ = proc.communicate()
    if proc.returncode != 0:
        raise RuntimeError(f"refresh child failed ({proc.returncode})")
    answer: dict[str, float] = json.loads(out.strip().splitlines()[-1])
    answer["peak_mib"] = peak()
    return answer


def _watch(pid: int, alive: Callable[[], bool]) -> Callable[[], float]:
    """Poll a process's VmHWM until it ends; the last value read (the peak)."""
    peak = [0.0]

    def poll() -> None:
        while alive():
            try:
                peak[0] = max(peak[0], peak_rss_mib(pid))
            except (OSError, RuntimeError):
                pass
            time.sleep(0.1)

    t = threading.Thread(target=poll, daemon=True)
    t.start()
    return lambda: (t.join(), peak[0])[1]


def _refresh_child(sa_url: str, now_iso: str, skip: set[int]) -> dict[str, float]:
    import resource
    from datetime import datetime

    from belated.clock import clock
    from belated.store import refresh
    from belated.store.db import make_engine, make_sessionmaker

    clock.set(datetime.fromisoformat(now_iso))
    engine = make_engine(sa_url)
    factory = make_sessionmaker(engine)
    r0 = resource.getrusage(resource.RUSAGE_SELF)
    w0 = time.perf_counter()
    marked = refresh.join_and_mark(factory)
    buckets = refresh.refresh_all(factory, max_values=100)
    wall = time.perf_counter() - w0
    dbname = sa_url.rsplit("/", 1)[1]
    db = sum(c for p, c in db_cpu(dbname).items() if p not in skip)
    engine.dispose()
    r = resource.getrusage(resource.RUSAGE_SELF)
    own = r.ru_utime + r.ru_stime - r0.ru_utime - r0.ru_stime  # imports left out
    return {"wall": wall, "own_cpu": own, "db_cpu": db, "marked": marked, "buckets": buckets}


if __name__ == "__main__":
    if sys.argv[1] != "refresh":
        raise SystemExit(f"unknown mode {sys.argv[1]!r}")
    done = _refresh_child(sys.argv[2], sys.argv[3], {int(p) for p in sys.argv[4:]})
    print(json.dumps(done))
