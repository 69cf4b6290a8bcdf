"""SIGKILL the service mid-ingest and mid-refresh, on PostgreSQL and on SQLite.

After a restart every batch answered 2xx is stored, no batch is partly stored (ids carry
their batch number), the dirty marks survive the crash, and the restarted refresh finishes
the work: the rollups then equal SQL counts over the raw rows and a `belated rebuild`.
Everything is checked with SQL, not through the API.
"""

from __future__ import annotations

import threading
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from belated.store.packing import unpack_delays, unpack_hist
from belated.store.statistics import COUNTS, SUMS
from tests.conftest import STORES
from tests.reliability.procs import (
    Service,
    Store,
    belated,
    create_model,
    create_token,
    dirty_hours,
    make_store,
    model_id,
    raw_hours,
    rollup_hours,
)
from tests.support.polling import wait_until

MODEL = "returns-crash"
BATCH = 200
INT_COLUMNS = COUNTS  # the declared statistics (belated.store.statistics)
FLOAT_COLUMNS = SUMS


def batch_items(j: int, end_hour: int, hours: int, size: int) -> list[dict[str, Any]]:
    """Batch j: ids `b<j>-<i>` so that SQL can count a batch; times spread over `hours`."""
    out = []
    for i in range(size):
        n = j * size + i
        second = (end_hour - hours + n % hours) * 3600 + (n * 7919) % 3600
        out.append(
            {
                "id": f"b{j:05d}-{i:04d}",
                "score": (n * 37 % 101) / 100,
                "ts": datetime.fromtimestamp(second, UTC).isoformat(),
                "tags": {
                    "channel": ("web", "app", "store")[n % 3],
                    "region": ("north", "south")[n % 2],
                },
            }
        )
    return out


def outcome(item: dict[str, Any]) -> str:
    """A true class that mostly follows the score."""
    return "1" if item["score"] >= 0.6 or int(item["id"][-4:]) % 7 == 0 else "0"


class Stream:
    """Threads that send prediction batches, each followed by its labels, until stopped."""

    def __init__(self, url: str, token: str, threads: int, end_hour: int) -> None:
        self.url, self.token, self.end_hour = url, token, end_hour
        self.acked: dict[str, set[int]] = {"predictions": set(), "labels": set()}
        self.sent: dict[str, set[int]] = {"predictions": set(), "labels": set()}
        self.cut = 0  # requests that got no answer because the service died
        self.other: list[str] = []
        self.stop = threading.Event()
        self.lock = threading.Lock()
        self.threads = [
            threading.Thread(target=self._run, args=(t, threads), daemon=True)
            for t in range(threads)
        ]

    def start(self) -> None:
        """Start sending."""
        for t in self.threads:
            t.start()

    def join(self) -> None:
        """Stop and wait for the threads."""
        self.stop.set()
        for t in self.threads:
            t.join(120)

    def _post(self, client: httpx.Client, kind: str, j: int, body: dict[str, Any]) -> bool:
        with self.lock:
            self.sent[kind].add(j)
        try:
            r = client.post(f"/v1/models/{MODEL}/{kind}", json=body)
        except httpx.TransportError:
            with self.lock:
                self.cut += 1
            self.stop.set()
            return False
        if r.status_code != 200:
            self.other.append(f"{kind} {j}: {r.status_code} {r.text[:200]}")
            return False
        with self.lock:
            self.acked[kind].add(j)
        return True

    def _run(self, t: int, step: int) -> None:
        with httpx.Client(
            base_url=self.url, timeout=120, headers={"Authorization": f"Bearer {self.token}"}
        ) as client:
            j = t
            while not self.stop.is_set():
                items = batch_items(j, self.end_hour, 72, BATCH)
                if not self._post(client, "predictions", j, {"predictions": items}):
                    return
                labels = [{"id": x["id"], "actual": outcome(x)} for x in items]
                if not self._post(client, "labels", j, {"labels": labels}):
                    return
                j += step


def per_batch(store: Store, mid: int, table: str, column: str) -> dict[int, int]:
    """Rows per batch number (ids `b<j>-<i>`): all rows, or those with `column` set."""
    return {
        int(r[0][1:]): int(r[1])
        for r in store.rows(
            f"SELECT substr(pid, 1, 6), count({column}) FROM {table} WHERE model_id = ?"
            " GROUP BY substr(pid, 1, 6)",
            mid,
        )
    }


def rollup_snapshot(store: Store, mid: int) -> dict[tuple[Any, ...], dict[str, Any]]:
    """Every rollup row of a model, histograms unpacked (belated.store.packing)."""
    cols = ", ".join(INT_COLUMNS + FLOAT_COLUMNS)
    out = {}
    for r in store.rows(
        f"SELECT level, start, seg_key, seg_value, {cols}, hist, delays"
        " FROM rollups WHERE model_id = ?",
        mid,
    ):
        ints, floats = 4 + len(INT_COLUMNS), 4 + len(INT_COLUMNS) + len(FLOAT_COLUMNS)
        blob, delays = r[floats], r[floats + 1]
        hist, sums = unpack_hist(bytes(blob) if blob else None)
        out[r[:4]] = {
            "ints": r[4:ints],
            "floats": np.array(r[ints:floats], dtype=float),
            "hist": hist,
            "sums": sums,
            "delays": unpack_delays(bytes(delays) if delays else None),
        }
    return out


def assert_same_rollups(got: dict[Any, Any], want: dict[Any, Any]) -> None:
    """Counts equal exactly, float sums to 1e-9 relative (DESIGN: summation order)."""
    assert got.keys() == want.keys(), (
        sorted(got.keys() - want.keys())[:5],
        sorted(want.keys() - got.keys())[:5],
    )
    for key, a in got.items():
        b = want[key]
        assert a["ints"] == b["ints"], (key, a["ints"], b["ints"])
        assert np.allclose(a["floats"], b["floats"], rtol=1e-9, atol=1e-12), key
        assert np.array_equal(a["hist"], b["hist"]), key
        assert np.allclose(a["sums"], b["sums"], rtol=1e-9, atol=1e-12), key
        n = max(len(a["delays"]), len(b["delays"]))
        assert np.array_equal(
            np.pad(a["delays"], (0, n - len(a["delays"]))),
            np.pad(b["delays"], (0, n - len(b["delays"]))),
        ), key


def restart_and_finish(store: Store, tmp_path: Path, mid: int) -> None:
    """Restart with the jobs on; the refresh empties the marks; rollups equal a rebuild."""
    service = Service(store, tmp_path, jobs=True, refresh_seconds=0.5, name="restarted")
    try:
        wait_until(
            lambda: not dirty_hours(store, mid),
            120,
            what=lambda: f"dirty buckets left: {len(dirty_hours(store, mid))}",
        )
    finally:
        service.stop()
    assert rollup_hours(store, mid) == raw_hours(store, mid)
    incremental = rollup_snapshot(store, mid)
    belated(store, "rebuild", "--model", MODEL)
    assert_same_rollups(incremental, rollup_snapshot(store, mid))


@pytest.mark.slow
@pytest.mark.parametrize("kind", STORES)
def test_sigkill_mid_ingest_keeps_every_acknowledged_batch_whole(kind: str, tmp_path: Path) -> None:
    with make_store(kind, tmp_path) as store:
        token = create_token(store)
        service = Service(store, tmp_path, jobs=False)
        create_model(service.url, token, MODEL)
        mid = model_id(store, MODEL)
        stream = Stream(service.url, token, 4, int(time.time() // 3600))
        stream.start()
        try:
            wait_until(
                lambda: len(stream.acked["labels"]) >= 6,
                180,
                what=lambda: f"six acknowledged label batches: {stream.other}",
            )
            service.kill()  # while the four threads have requests in flight
        finally:
            stream.join()
            service.stop()
        assert not stream.other
        assert stream.cut >= 1, "no request was in flight when the service died"

        preds = per_batch(store, mid, "predictions", "*")
        labelled = per_batch(store, mid, "predictions", "actual")
        history = per_batch(store, mid, "labels", "*")
        # no batch is partly there; every acknowledged batch is there whole
        assert set(preds.values()) == {BATCH}, preds
        assert set(history.values()) <= {BATCH} and set(labelled.values()) <= {0, BATCH}
        assert stream.acked["predictions"] <= set(preds) <= stream.sent["predictions"]
        assert stream.acked["labels"] <= {j for j, n in labelled.items() if n == BATCH}
        assert {j for j, n in labelled.items() if n} == set(history)
        assert set(history) <= stream.sent["labels"]
        assert store.scalar("SELECT count(*) FROM pending_labels") == 0
        unanswered = stream.sent["predictions"] - stream.acked["predictions"]
        print(
            f"\n{kind}: {len(stream.acked['predictions'])} prediction and "
            f"{len(stream.acked['labels'])} label batches acknowledged; {stream.cut} requests "
            f"cut; of {len(unanswered)} unanswered prediction batches "
            f"{len(unanswered & set(preds))} were stored whole, the rest not at all"
        )
        # the marks of everything written survived the crash (nothing refreshed them)
        assert dirty_hours(store, mid) == set(raw_hours(store, mid))
        restart_and_finish(store, tmp_path, mid)


@pytest.mark.slow
@pytest.mark.parametrize("kind", STORES)
def test_sigkill_mid_refresh_loses_no_dirty_mark(kind: str, tmp_path: Path) -> None:
    hours = 60 * 24  # a backlog of 1,440 dirty hours, refreshed 168 at a time
    with make_store(kind, tmp_path) as store:
        token = create_token(store)
        service = Service(store, tmp_path, jobs=False)
        create_model(service.url, token, MODEL)
        mid = model_id(store, MODEL)
        end_hour = int(time.time() // 3600)
        with service.client(token) as client:
            for j in range(6):
                items = batch_items(j, end_hour, hours, 2400)
                r = client.post(f"/v1/models/{MODEL}/predictions", json={"predictions": items})
                assert r.status_code == 200, r.text
                labels = [{"id": x["id"], "actual": outcome(x)} for x in items[::3]]
                r = client.post(f"/v1/models/{MODEL}/labels", json={"labels": labels})
                assert r.status_code == 200, r.text
        service.stop()
        backlog = len(dirty_hours(store, mid))
        assert backlog == hours

        # jobs on: the first refresh starts as the process starts; kill once it is under way
        service = Service(store, tmp_path, jobs=True, refresh_seconds=0.5, wait=False)
        try:
            wait_until(
                lambda: 0 < len(dirty_hours(store, mid)) < backlog,
                180,
                step=0.01,
                what="the refresh caught under way",
            )
            service.kill()
        finally:
            service.stop()
        left = dirty_hours(store, mid)
        assert 0 < len(left) < backlog, "the kill came after the refresh ended"
        print(f"\n{kind}: killed with {len(left)} of {backlog} hours still dirty")
        # each finished batch committed whole: a clean hour's rollup equals its raw rows
        raw, rolled = raw_hours(store, mid), rollup_hours(store, mid)
        clean = set(raw) - left
        assert {h: rolled.get(h) for h in clean} == {h: raw[h] for h in clean}
        restart_and_finish(store, tmp_path, mid)
