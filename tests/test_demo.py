"""`belated demo` as a new user runs it, as a separate process: it fails at once on a taken
port, prints its address, both tokens and its store, progress while it sends, then the alerts,
and the same seed gives the same alerts, run after run (the second run starts afresh).

The story (service/belated/demo/shop.py) changes on day 60 of its calendar, in the north; the
alerts are checked against that day.
"""

from __future__ import annotations

import os
import re
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import pytest

from tests.conftest import STORES, create_pg_database, drop_pg_database, pg_url

BELATED = Path(sys.executable).with_name("belated")
DAYS, SEED, CHANGE_DAY = 90, 1, 60
KEYS = ("url", "token", "admin token", "store")


def _env() -> dict[str, str]:
    return {**os.environ, "BELATED_LOG_FORMAT": "text"}


def test_a_taken_port_fails_at_once_and_names_the_option(tmp_path: Path) -> None:
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen(1)
        port = taken.getsockname()[1]
        proc = subprocess.run(
            [str(BELATED), "demo", "--port", str(port)],
            capture_output=True,
            text=True,
            env=_env(),
            cwd=tmp_path,
            timeout=120,  # a bound on the wait, not a speed check: it used to hang forever
        )
    assert proc.returncode == 1
    err = proc.stderr.strip().splitlines()
    assert err == [
        f"belated demo: port {port} on 127.0.0.1 is already in use; choose another with "
        "--port (--port 0 takes any free port)"
    ]
    assert "url:" not in proc.stdout
    assert not (tmp_path / "belated-demo.db").exists()  # refused before anything was written


def _run_demo(cwd: Path, database_url: str | None) -> tuple[list[str], dict[str, str]]:
    """Run the demo until it prints its alerts; its stdout lines and the printed key lines."""
    args = [str(BELATED), "demo", "--days", str(DAYS), "--seed", str(SEED), "--port", "0"]
    if database_url:
        args += ["--database-url", database_url]
    stamp = time.monotonic_ns()
    out = (cwd / f"demo-{stamp}.out").open("w+")
    err = cwd / f"demo-{stamp}.err"  # read when the demo ends early: the cause is there
    errf = err.open("w")
    proc = subprocess.Popen(args, stdout=out, stderr=errf, env=_env(), cwd=cwd)
    try:
        deadline = time.monotonic() + 1200
        text = ""
        while time.monotonic() < deadline:
            out.seek(0)
            text = out.read()
            if "serving until interrupted" in text:
                break
            assert proc.poll() is None, text + err.read_text()[-4000:]
            time.sleep(1)
        lines = text.splitlines()
        printed = {}
        for key in KEYS:
            found = [x for x in lines if x.startswith(f"{key}: ")]
            assert len(found) == 1, (key, lines)
            printed[key] = found[0].split(": ", 1)[1]
        _check_tokens(printed)
        return lines, printed
    finally:
        proc.terminate()
        proc.wait(60)
        out.close()
        errf.close()


def _check_tokens(printed: dict[str, str]) -> None:
    """The read token reads and cannot write; the admin token writes."""
    url = printed["url"]
    read = {"Authorization": f"Bearer {printed['token']}"}
    admin = {"Authorization": f"Bearer {printed['admin token']}"}
    assert httpx.get(f"{url}v1/models/returns-v2", headers=read).status_code == 200
    assert httpx.post(f"{url}v1/models", json={"name": "x"}, headers=read).status_code == 403
    made = httpx.post(
        f"{url}v1/models", json={"name": f"armchairs-{time.monotonic_ns()}"}, headers=admin
    )
    assert made.status_code == 201, made.text


@pytest.fixture(params=STORES)
def demo_store(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str | None]:
    """None: the demo's own ./belated-demo.db; else a fresh PostgreSQL database's URL."""
    if request.param == "sqlite":
        yield None
        return
    name = create_pg_database("belated_demo")
    try:
        yield pg_url(name)
    finally:
        drop_pg_database(name)


@pytest.mark.slow
def test_the_same_seed_raises_the_same_alerts_and_the_north_change_stays_raised(
    tmp_path: Path, demo_store: str | None
) -> None:
    first, printed = _run_demo(tmp_path, demo_store)
    second, again = _run_demo(tmp_path, demo_store)
    if demo_store is None:
        db = tmp_path / "belated-demo.db"
        assert printed["store"] == again["store"] == str(db) and db.exists()
        assert not any("starting afresh" in x for x in first)
        assert any(x.startswith("an earlier demo file is at") for x in second)
    else:
        assert printed["store"].startswith("postgresql")
        assert any("earlier demo model returns-v2" in x for x in second)
    # progress while sending: rows and rows per second, the last line the whole batch
    progress = [x for x in first if x.startswith("sending predictions: ")]
    assert progress and re.fullmatch(
        r"sending predictions: ([\d,]+) of \1 rows \([\d,]+ rows/s\)", progress[-1]
    )
    # the same data and the same alerts
    sent = [x for x in first if x.startswith("sent ")]
    assert sent and sent == [x for x in second if x.startswith("sent ")]
    alerts = [x for x in first if x.startswith("alert: ")]
    assert alerts and alerts == [x for x in second if x.startswith("alert: ")]
    # the story: all in the north, starting on the day of the change (or the next window);
    # the precision drop stays raised once the outcomes are in
    assert all("region:north" in x for x in alerts), alerts
    change = (datetime.now(UTC) - timedelta(days=DAYS - CHANGE_DAY)).date()
    firsts = {
        x: datetime.strptime(m, "%Y-%m-%d").date()
        for x in alerts
        for m in re.findall(r"window of (\d{4}-\d{2}-\d{2})", x)
    }
    shift = [x for x in alerts if "shift positive_rate" in x]
    assert shift and change <= firsts[shift[0]] <= change + timedelta(days=1)
    precision = [x for x in alerts if x.startswith("alert: raised drop precision")]
    assert precision and firsts[precision[0]] >= change
    # the change is marked on the model's charts, on its day
    marker = [x for x in first if x.startswith("marker: ")]
    assert marker == [f"marker: {change:%Y-%m-%d} new sofa supplier delivering in the north"]
