"""`belated serve --read-only` on a SQLite file: refused, before anything listens, on a
file it cannot serve; served over HTTP beside the process that writes it."""

from __future__ import annotations

import sqlite3
import subprocess
import sys
from pathlib import Path

import httpx
from sqlalchemy import text

from belated.store.db import make_engine, make_sessionmaker
from belated.store.migrate import upgrade
from tests.conftest import make_tenant
from tests.hostile.pgcluster import ServiceProcess


def _serve(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "belated", "serve", "--port", "0", *args],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=cwd,
        check=False,
    )


def test_read_only_sqlite_refuses_a_store_it_cannot_serve_before_listening(
    tmp_path: Path,
) -> None:
    missing = tmp_path / "missing.db"
    done = _serve(["--read-only", "--database-url", f"sqlite:///{missing}"], tmp_path)
    assert done.returncode == 2
    assert "--read-only" in done.stderr and "does not answer" in done.stderr
    assert not missing.exists()  # a read-only start creates nothing
    empty = tmp_path / "empty.db"
    sqlite3.connect(empty).close()
    done = _serve(["--read-only", "--database-url", f"sqlite:///{empty}"], tmp_path)
    assert done.returncode == 2 and "no migration" in done.stderr
    assert "belated migrate" in done.stderr
    with sqlite3.connect(empty) as conn:  # nothing migrated it
        assert conn.execute("SELECT count(*) FROM sqlite_master").fetchone() == (0,)


def test_read_only_sqlite_serves_reads_and_refuses_writes(tmp_path: Path) -> None:
    """A second process reads the SQLite file its writer serves (BELATED_READ_ONLY)."""
    db = tmp_path / "shop.db"
    url = f"sqlite:///{db}"
    upgrade(url)
    engine = make_engine(url)
    with (
        ServiceProcess(url, tmp_path / "ro.log", env={"BELATED_READ_ONLY": "true"}) as ro,
        httpx.Client(base_url=ro.url, timeout=30) as c,
    ):
        tenant = make_tenant(make_sessionmaker(engine), c)
        health = c.get("/healthz").json()
        assert health["read_only"] is True and health["standby"] is False
        assert health["staleness_seconds"] is None  # no refresh has completed yet
        assert "x-belated-staleness" not in c.get("/healthz").headers
        assert c.get("/v1/models").json()["items"] == []
        r = c.post("/v1/models", json={"name": "sofas"})
        assert r.status_code == 405 and r.headers["allow"] == "GET, HEAD"
        with engine.connect() as conn:
            assert conn.execute(text("SELECT count(*) FROM models")).scalar_one() == 0
        assert tenant.project_id > 0
    engine.dispose()
    assert "readonly" not in (tmp_path / "ro.log").read_text().lower()
