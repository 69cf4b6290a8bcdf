"""The spool on a real file system: order across processes, the bound, leftovers of a killed
write, rejected/; and a recording process killed with SIGKILL, whose spilled rows all arrive.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import Engine

from belated.client import Recorder
from belated.client.spool import Batch, Spool, SpoolInUse
from tests.client.recording import spool_files, spool_items
from tests.conftest import LiveServer, Tenant
from tests.support import base_time, create_model, rows, stamp, wait_until


def batch(model: str, first: int, n: int) -> Batch:
    """n predictions with consecutive ids, encoded as the request body."""
    items = [
        {"id": f"p-{i:04d}", "ts": "2026-01-01T00:00:00Z", "score": 0.5}
        for i in range(first, first + n)
    ]
    return Batch(model, "predictions", n, json.dumps({"predictions": items}).encode())


def test_batches_keep_their_order_across_processes_and_stay_under_the_bound(
    tmp_path: Path,
) -> None:
    first = batch("sofas", 0, 10)
    spool = Spool(tmp_path, max_bytes=3 * len(first.body) + 10)
    assert (
        spool.put(first)
        and spool.put(batch("tables", 10, 10))
        and spool.put(batch("sofas", 20, 10))
    )
    assert not spool.put(batch("sofas", 30, 10))  # a fourth does not fit
    assert (len(spool), spool.rows) == (3, 30)
    spool.pop()
    spool.close()
    # A write cut short by a kill leaves a hidden temporary file; foreign files are let be.
    (tmp_path / ".tmp-0000000000000009-5-predictions-sofas.json").write_bytes(b'{"predic')
    (tmp_path / "notes.txt").write_text("mine")

    again = Spool(tmp_path, max_bytes=10**6)
    assert (len(again), again.rows) == (2, 20)
    assert again.put(batch("sofas", 40, 5))  # numbered after what the first process left
    heads = []
    while (head := again.head()) is not None:
        heads.append((head.model, json.loads(head.body)["predictions"][0]["id"]))
        again.pop()
    assert heads == [("tables", "p-0010"), ("sofas", "p-0020"), ("sofas", "p-0040")]
    assert sorted(p.name for p in tmp_path.iterdir()) == [".lock", "notes.txt", "rejected"]


def test_one_process_owns_a_spool_and_the_memory_spool_has_the_same_bound(tmp_path: Path) -> None:
    spool = Spool(tmp_path, max_bytes=10**6)
    with pytest.raises(SpoolInUse):
        Spool(tmp_path, max_bytes=10**6)
    spool.close()
    Spool(tmp_path, max_bytes=10**6).close()  # free again once closed

    memory = Spool(None, max_bytes=len(batch("m", 0, 4).body))
    assert memory.put(batch("m", 0, 4)) and not memory.put(batch("m", 4, 1))
    assert memory.head() == batch("m", 0, 4)
    assert memory.set_aside(batch("m", 0, 4), 422, {"title": "Invalid input"}) is None


def test_a_set_aside_batch_is_a_readable_body_beside_its_problem(tmp_path: Path) -> None:
    spool = Spool(tmp_path, max_bytes=10**6)
    refused = batch("sofas", 0, 3)
    problem = {"status": 409, "title": "Conflict", "detail": "p-1 is stored with other content"}
    path = spool.set_aside(refused, 409, problem)
    assert path is not None and path.read_bytes() == refused.body
    note = json.loads(path.with_name(path.name.replace(".json", ".problem.json")).read_bytes())
    assert note["problem"] == problem and note["path"] == "/v1/models/sofas/predictions"
    assert note["rows"] == 3 and note["status"] == 409
    assert len(spool) == 0  # set aside is not queued for sending


KILLED = """
import json, sys, time
from belated.client import Recorder
url, token, model, ts, spool = sys.argv[1:6]
rec = Recorder(url, token, spool_dir=spool, batch_size=200, flush_seconds=0.05,
               backoff=0.05, max_backoff=0.2)
n = 0
while True:
    for _ in range(50):
        rec.record_prediction(model, f"k-{n:07d}", ts, score=(n % 100) / 100)
        n += 1
    st = rec.stats()
    print(json.dumps({"recorded": n, "spilled": st.spilled, "dropped": st.dropped}), flush=True)
    time.sleep(0.005)
"""


def test_sigkill_of_the_recording_process_loses_no_spilled_row(
    app: Any, tenant: Tenant, engine: Engine, tmp_path: Path
) -> None:
    model = create_model(tenant, engine)
    server = LiveServer(app, hold_port=True)  # the service is down until it starts
    token = tenant.tokens["admin,ingest,read"]
    spool = tmp_path / "spool"
    args = [server.url, token, model.name, stamp(base_time()), str(spool)]
    reports: list[dict[str, int]] = []
    with (
        (tmp_path / "child.err").open("w") as err,
        subprocess.Popen(
            [sys.executable, "-c", KILLED, *args], stdout=subprocess.PIPE, stderr=err, text=True
        ) as child,
    ):

        def read() -> None:
            assert child.stdout is not None
            for line in child.stdout:
                reports.append(json.loads(line))

        reader = threading.Thread(target=read, daemon=True)
        reader.start()
        try:
            # Kill it mid-stride: well into the outage, while it still records and spills.
            wait_until(
                lambda: reports and reports[-1]["spilled"] >= 6_000,
                60,
                what=lambda: f"{reports[-1:]} {(tmp_path / 'child.err').read_text()[-2000:]}",
            )
            last = reports[-1]
            os.kill(child.pid, signal.SIGKILL)
            child.wait(30)
        finally:
            if child.poll() is None:
                child.kill()
        reader.join(10)
    assert child.returncode == -signal.SIGKILL

    # Every file is whole, and they hold the oldest rows in order: what was lost was newer
    # than anything spilled, i.e. still in memory.
    kept = [item["id"] for item in spool_items(spool)]
    recorded = reports[-1]["recorded"]
    assert last["dropped"] == 0 and len(kept) >= last["spilled"] >= 6_000
    assert kept == [f"k-{n:07d}" for n in range(len(kept))]
    lost = recorded - len(kept)
    print(f"SIGKILL after {recorded} rows: {len(kept)} in the spool, {lost} lost from memory")

    with server:
        again = Recorder(server.url, token, spool_dir=str(spool), backoff=0.05)
        wait_until(lambda: again.stats().sent == len(kept), 120, what=again.stats)
        assert again.close(timeout=5).spooled == 0
    found = rows(engine, "SELECT pid FROM predictions WHERE model_id = :m ORDER BY pid", m=model.id)
    assert [r[0] for r in found] == kept
    assert spool_files(spool) == []
