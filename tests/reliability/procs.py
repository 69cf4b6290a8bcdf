"""Real service processes, throwaway stores, and counts read straight from the database.

Everything here talks to the store with sqlite3 or psycopg directly (never through the API),
so a check of what the service stored does not depend on the service's own reading code.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import random
import signal
import sqlite3
import subprocess
import threading
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import psycopg

from tests.conftest import REPO, create_pg_database, drop_pg_database, free_port, pg_url

BELATED = REPO / ".venv" / "bin" / "belated"


@dataclass
class Store:
    """A migrated SQLite file or PostgreSQL database of one test."""

    kind: str
    url: str
    path: Path | None = None
    dbname: str | None = None

    def connect(self) -> Any:
        """A fresh DB-API connection in autocommit mode (reads see every committed write)."""
        if self.kind == "sqlite":
            assert self.path is not None
            return sqlite3.connect(self.path, isolation_level=None, timeout=30)
        return psycopg.connect(self.url.replace("+psycopg", ""), autocommit=True)

    def rows(self, sql: str, *params: Any) -> list[tuple[Any, ...]]:
        """Run a query written with `?` placeholders and return every row."""
        if self.kind != "sqlite":
            sql = sql.replace("?", "%s")
        conn = self.connect()
        try:
            return [tuple(r) for r in conn.execute(sql, params).fetchall()]
        finally:
            conn.close()

    def scalar(self, sql: str, *params: Any) -> Any:
        """The first column of the first row."""
        return self.rows(sql, *params)[0][0]

    def env(self, **extra: str) -> dict[str, str]:
        """A process environment on this store and no other BELATED_ setting."""
        env = {k: v for k, v in os.environ.items() if not k.startswith("BELATED_")}
        env["BELATED_DATABASE_URL"] = self.url
        env.update(extra)
        return env


@contextmanager
def make_store(kind: str, tmp_path: Path) -> Iterator[Store]:
    """A migrated store of the given kind, removed afterwards (PostgreSQL: dropped)."""
    from belated.store.migrate import upgrade

    if kind == "sqlite":
        path = tmp_path / "reliability.db"
        store = Store("sqlite", f"sqlite:///{path}", path=path)
        upgrade(store.url)
        yield store
        return
    name = create_pg_database("belated_rel")
    try:
        store = Store("postgresql", pg_url(name), dbname=name)
        upgrade(store.url)
        yield store
    finally:
        drop_pg_database(name)


def belated(store: Store, *args: str, timeout: float = 300) -> str:
    """Run a `belated` command on the store to completion and return its stdout."""
    done = subprocess.run(
        [str(BELATED), *args],
        env=store.env(),
        text=True,
        capture_output=True,
        timeout=timeout,
        check=False,
    )
    assert done.returncode == 0, f"belated {' '.join(args)} failed:\n{done.stderr[-3000:]}"
    return done.stdout


def create_token(store: Store, project: str = "furniture-shop") -> str:
    """A token of every scope, made by the CLI (it prints the token alone on its last line)."""
    out = belated(store, "keys", "create", "--project", project, "--scopes", "ingest,read,admin")
    return out.rstrip("\n").splitlines()[-1]


class Service:
    """`belated serve` as a subprocess on a loopback port, with its log in `workdir`."""

    def __init__(
        self,
        store: Store,
        workdir: Path,
        *,
        jobs: bool,
        refresh_seconds: float = 60.0,
        name: str = "service",
        wait: bool = True,
        port: int | None = None,
        workers: int = 1,
    ) -> None:
        self.store = store
        self.port = port or free_port()  # a port of its own, or the one of a stopped service
        self.url = f"http://127.0.0.1:{self.port}"
        self.log_path = workdir / f"{name}-{self.port}.log"
        env = store.env(
            BELATED_JOBS="true" if jobs else "false", BELATED_REFRESH_SECONDS=str(refresh_seconds)
        )
        args = [str(BELATED), "serve", "--host", "127.0.0.1", "--port", str(self.port)]
        if not jobs:
            args.append("--no-jobs")
        if workers > 1:
            args += ["--workers", str(workers)]
        workdir.mkdir(parents=True, exist_ok=True)
        self._log = self.log_path.open("ab")
        # cwd of its own: no stray .env or default SQLite file is read or left behind
        self.proc = subprocess.Popen(
            args, cwd=workdir, env=env, stdout=self._log, stderr=subprocess.STDOUT
        )
        if wait:
            self.wait_ready()

    def wait_ready(self, timeout: float = 120.0) -> None:
        """Poll /healthz until it answers 200 (a loaded 2-core machine can take 30 s)."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and self.proc.poll() is None:
            with suppress(httpx.HTTPError):
                if httpx.get(self.url + "/healthz", timeout=2).status_code == 200:
                    return
            time.sleep(0.1)
        self.stop()
        raise AssertionError(f"the service did not come up in {timeout} s:\n{self.log_tail()}")

    def health(self) -> dict[str, Any]:
        """GET /healthz."""
        r = httpx.get(self.url + "/healthz", timeout=10)
        assert r.status_code == 200, r.text
        return dict(r.json())

    def client(self, token: str, timeout: float = 60.0) -> httpx.Client:
        """An HTTP client with the token."""
        return httpx.Client(
            base_url=self.url, timeout=timeout, headers={"Authorization": f"Bearer {token}"}
        )

    def kill(self) -> None:
        """SIGKILL: no shutdown code of the service runs."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGKILL)
        self.proc.wait(30)
        self._log.close()

    def stop(self) -> None:
        """SIGTERM, then SIGKILL if it lingers."""
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(20)
        self._log.close()

    def log_tail(self, chars: int = 4000) -> str:
        """The end of the service's output, for failure messages."""
        return self.log_path.read_text(errors="replace")[-chars:]


def create_model(url: str, token: str, name: str, **fields: Any) -> None:
    """POST /v1/models (binary, default threshold 0.5 unless told)."""
    r = httpx.post(
        url + "/v1/models",
        json={"name": name, **fields},
        timeout=30,
        headers={"Authorization": f"Bearer {token}"},
    )
    assert r.status_code == 201, r.text


def model_id(store: Store, name: str) -> int:
    """The row id of a model, read from the models table."""
    return int(store.scalar("SELECT id FROM models WHERE name = ?", name))


def raw_hours(store: Store, mid: int) -> dict[int, tuple[int, ...]]:
    """Per hour from raw prediction rows: predictions, labelled, tp, fp, fn, tn."""
    return {
        r[0]: tuple(int(x) for x in r[1:])
        for r in store.rows(
            """
        SELECT hour, count(*), count(actual),
          sum(CASE WHEN predicted = '1' AND actual = '1' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '1' AND actual = '0' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '0' AND actual = '1' THEN 1 ELSE 0 END),
          sum(CASE WHEN predicted = '0' AND actual = '0' THEN 1 ELSE 0 END)
        FROM predictions WHERE model_id = ? GROUP BY hour""",
            mid,
        )
    }


def rollup_hours(store: Store, mid: int) -> dict[int, tuple[int, ...]]:
    """The same figures from the whole-model hourly rollups."""
    return {
        r[0]: tuple(int(x) for x in r[1:])
        for r in store.rows(
            """
        SELECT start, n_pred, n_labelled, tp, fp, fn, tn FROM rollups
        WHERE model_id = ? AND level = 'h' AND seg_key = ''""",
            mid,
        )
    }


def dirty_hours(store: Store, mid: int) -> set[int]:
    """The model's hours marked dirty."""
    return {int(r[0]) for r in store.rows("SELECT hour FROM dirty_buckets WHERE model_id = ?", mid)}


# ---- client processes: the concurrent writers of the load test and bench/load.py ----------


@dataclass(frozen=True)
class LoadPlan:
    """What every writer process sends: batches of predictions over `hours` hours before
    `end_hour` (epoch hours), labels for most of them (before, with or after their
    predictions), deliberate repeats of whole batches, and corrections of some labels."""

    url: str
    token: str
    model: str
    seconds: float
    end_hour: int
    hours: int = 48
    batch: int = 50
    label_share: float = 0.7
    retry_share: float = 0.25
    correction_share: float = 0.3


def prediction_item(plan: LoadPlan, k: int, j: int, i: int) -> dict[str, Any]:
    """Prediction i of batch j of writer k: the same content every time it is built."""
    rng = random.Random(f"{k}/{j}/{i}")
    second = (plan.end_hour - plan.hours) * 3600 + rng.randrange(plan.hours * 3600)
    ts = datetime.fromtimestamp(second, UTC).isoformat().replace("+00:00", "Z")
    return {
        "id": f"w{k}-{j:05d}-{i:03d}",
        "ts": ts,
        "score": rng.randrange(101) / 100,
        "tags": {"channel": rng.choice(("web", "app", "store"))},
    }


def writer(plan: LoadPlan, k: int, out: str) -> None:
    """One client process: send batches until the time is up, then dump its log as JSON."""
    log: dict[str, Any] = {"preds": {}, "labels": [], "accepted": 0, "requests": [], "failures": []}
    lock = threading.Lock()
    seq = iter(range(10**9))
    client = httpx.Client(
        base_url=plan.url, timeout=120, headers={"Authorization": f"Bearer {plan.token}"}
    )

    def post(kind: str, body: dict[str, Any]) -> dict[str, Any] | None:
        # every batch is sent until acknowledged, so the log says exactly what is stored
        n = len(body[kind])
        for _ in range(60):
            t0 = time.perf_counter()
            try:
                r = client.post(f"/v1/models/{plan.model}/{kind}", json=body)
            except httpx.TransportError as exc:
                with lock:
                    log["requests"].append([kind, 0, time.perf_counter() - t0, False, n])
                    log["failures"].append(f"{kind}: {type(exc).__name__} {exc}")
                time.sleep(0.5)
                continue
            wait = r.headers.get("retry-after")
            with lock:
                log["requests"].append(
                    [kind, r.status_code, time.perf_counter() - t0, wait is not None, n]
                )
            if r.is_success:
                return dict(r.json())
            if r.status_code == 503 and wait is not None:
                time.sleep(min(float(wait), 2.0))  # honoured, within the test's patience
                continue
            with lock:
                log["failures"].append(f"{kind} {r.status_code}: {r.text[:300]}")
            if r.status_code < 500:
                return None
            time.sleep(0.5)
        return None

    def send_preds(items: list[dict[str, Any]]) -> None:
        answer = post("predictions", {"predictions": items})
        if answer is not None:
            with lock:
                log["accepted"] += answer["accepted"]
                log["preds"].update({p["id"]: [p["ts"], p["score"]] for p in items})

    def send_labels(items: list[dict[str, Any]]) -> None:
        if items and post("labels", {"labels": items}) is not None:
            with lock:
                n = next(seq)
                log["labels"].extend([n, x["id"], x["actual"]] for x in items)

    started = time.monotonic()
    deadline = started + plan.seconds
    with ThreadPoolExecutor(2) as pool:
        j = 0
        while time.monotonic() < deadline:
            rng = random.Random(f"step/{k}/{j}")
            preds = [prediction_item(plan, k, j, i) for i in range(plan.batch)]
            labels = [
                {"id": p["id"], "actual": "1" if rng.random() < p["score"] else "0"}
                for p in preds
                if rng.random() < plan.label_share
            ]
            mode = (j + k) % 4
            if mode == 0:  # labels first: they wait as pending until their predictions come
                send_labels(labels)
                send_preds(preds)
            elif mode == 2:
                send_preds(preds)
                send_labels(labels)
            else:  # labels racing their predictions in concurrent requests
                done = [pool.submit(send_preds, preds), pool.submit(send_labels, labels)]
                for f in done:
                    f.result()
            if rng.random() < plan.retry_share:  # a client that did not see the answers
                send_preds(preds)
                send_labels(labels)
            if mode == 3:  # the outcome feed corrects some labels after the race
                send_labels(
                    [
                        {"id": x["id"], "actual": "0" if x["actual"] == "1" else "1"}
                        for x in labels
                        if rng.random() < plan.correction_share
                    ]
                )
            j += 1
    client.close()
    log["batches"] = j
    log["elapsed"] = time.monotonic() - started
    Path(out).write_text(json.dumps(log))


def run_writers(plan: LoadPlan, workdir: Path, n: int = 8) -> list[dict[str, Any]]:
    """Start n writer processes (each with its own HTTP client), wait, return their logs."""
    ctx = mp.get_context("fork")  # the children start at once, modules already loaded
    outs = [str(workdir / f"writer-{k}.json") for k in range(n)]
    procs = [ctx.Process(target=writer, args=(plan, k, outs[k])) for k in range(n)]
    for p in procs:
        p.start()
    for p in procs:
        p.join(plan.seconds + 300)
        assert p.exitcode == 0, f"a writer process ended with {p.exitcode}"
    return [json.loads(Path(o).read_text()) for o in outs]
