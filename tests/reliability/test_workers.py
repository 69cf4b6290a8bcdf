"""`belated serve --workers N`: several API processes on one port, the jobs run once.

A real `belated serve --workers 2` on PostgreSQL: two worker processes answer on the one
port; small and large batches from concurrent clients are all stored once and a read through
either process reflects them; one process alone holds the jobs' leader lock, and the
scheduled refresh empties the dirty marks. On SQLite the option is refused (one process
serves an embedded store) before anything listens.
"""

from __future__ import annotations

import subprocess
import threading
import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from belated.jobs.leader import LEADER_LOCK
from tests.reliability.procs import (
    BELATED,
    Service,
    create_model,
    create_token,
    make_store,
    model_id,
)
from tests.support.polling import wait_until

pytestmark = pytest.mark.slow
MODEL = "returns-workers"


def _children(pid: int) -> list[int]:
    """The live child processes of `pid` (from /proc)."""
    found = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        if int(fields[1]) == pid and fields[0] != "Z":
            found.append(int(stat.parent.name))
    return found


def _items(writer: int, n: int, start: int) -> list[dict[str, object]]:
    midnight = datetime.now(UTC).replace(hour=0, minute=0, second=0, microsecond=0)
    base = midnight - timedelta(days=3)  # 8 writers' rows span 27 hours from here
    return [
        {
            "id": f"w{writer}-{i}",
            "ts": (base + timedelta(seconds=37 * i)).isoformat(),
            "score": (i * 7919 % 1000) / 1000,
            "tags": {"region": ("north", "south")[i % 2]},
        }
        for i in range(start, start + n)
    ]


def test_two_api_processes_serve_one_port_and_the_jobs_run_once(tmp_path: Path) -> None:
    with make_store("postgresql", tmp_path) as store:
        token = create_token(store)
        service = Service(store, tmp_path, jobs=True, refresh_seconds=1.0, workers=2)
        try:
            wait_until(lambda: len(_children(service.proc.pid)) >= 2, 60, what="two workers")
            create_model(service.url, token, MODEL)
            errors: list[str] = []

            def write(writer: int) -> None:
                with service.client(token) as client:
                    sent = 0
                    for size in (1, 20, 1, 500, 3):  # small ones grouped, a large one alone
                        for _ in range(5):
                            body = {"predictions": _items(writer, size, sent)}
                            r = client.post(f"/v1/models/{MODEL}/predictions", json=body)
                            if r.status_code != 200 or r.json()["accepted"] != size:
                                errors.append(f"{r.status_code} {r.text[:200]}")
                            sent += size

            threads = [threading.Thread(target=write, args=(w,)) for w in range(8)]
            for t in threads:
                t.start()
            for t in threads:
                t.join()
            assert errors == []
            per_writer = 5 * (1 + 20 + 1 + 500 + 3)
            mid = model_id(store, MODEL)
            assert (
                store.scalar("SELECT count(*) FROM predictions WHERE model_id = ?", mid)
                == 8 * per_writer
            )
            # one leader among the processes: one session-level advisory lock on its key
            key_hi, key_lo = LEADER_LOCK >> 32, LEADER_LOCK & 0xFFFFFFFF
            held = store.scalar(
                "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND granted"
                " AND classid = ? AND objid = ? AND objsubid = 1",
                key_hi,
                key_lo,
            )
            assert held == 1
            # the scheduled refresh (of that one leader) takes every dirty mark
            wait_until(
                lambda: (
                    store.scalar("SELECT count(*) FROM dirty_buckets WHERE model_id = ?", mid) == 0
                ),
                120,
                what="the refresh to take every dirty mark",
            )
            # a read through either process (several connections) counts every row
            today = datetime.now(UTC).replace(hour=0, minute=0, second=0, microsecond=0)
            first_day = (today - timedelta(days=4)).isoformat()
            last_day = today.isoformat()
            for _ in range(6):
                with service.client(token) as client:
                    r = client.get(
                        f"/v1/models/{MODEL}/metrics",
                        params={"granularity": "day", "start": first_day, "end": last_day},
                    )
                assert r.status_code == 200, r.text
                windows = r.json()["windows"]
                assert sum(w["predictions"] for w in windows) == 8 * per_writer, windows[-3:]
        finally:
            service.stop()
        time.sleep(0)  # the children went with their parent
        assert _children(service.proc.pid) == []


def test_workers_are_refused_on_sqlite_before_anything_listens(tmp_path: Path) -> None:
    with make_store("sqlite", tmp_path) as store:
        done = subprocess.run(
            [str(BELATED), "serve", "--port", "0", "--workers", "2", "--no-jobs"],
            env=store.env(),
            cwd=tmp_path,
            capture_output=True,
            text=True,
            timeout=120,
            check=False,
        )
    assert done.returncode == 2
    assert "--workers needs PostgreSQL" in done.stderr
    assert "Uvicorn running" not in done.stderr + done.stdout
