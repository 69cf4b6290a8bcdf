"""The `belated` command run as a real subprocess on fresh SQLite files."""

from __future__ import annotations

import os
import sqlite3
import subprocess
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from fastapi.testclient import TestClient

from belated.app import create_app
from belated.config import Settings
from belated.store import keys
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.keys import hash_token
from belated.store.migrate import upgrade
from tests.conftest import REPO, free_port
from tests.support import model_body, predictions

BELATED = REPO / ".venv" / "bin" / "belated"


def env_for(db: Path, **extra: str) -> dict[str, str]:
    """The process environment with the store at `db` and no other BELATED_ setting."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("BELATED_")}
    env["BELATED_DATABASE_URL"] = f"sqlite:///{db}"
    env.update(extra)
    return env


def run(args: list[str], db: Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    """Run the command to completion."""
    return subprocess.run(
        [str(BELATED), *args],
        env=env_for(db),
        cwd=cwd,
        text=True,
        capture_output=True,
        timeout=120,
        check=False,
    )


def token_count(db: Path) -> int:
    """Rows in the tokens table (0 when the file or table does not exist)."""
    if not db.exists():
        return 0
    with sqlite3.connect(db) as conn:
        found = conn.execute(
            "SELECT count(*) FROM sqlite_master WHERE type = 'table' AND name = 'tokens'"
        ).fetchone()[0]
        return int(conn.execute("SELECT count(*) FROM tokens").fetchone()[0]) if found else 0


def test_keys_create_prints_a_working_token_alone_on_the_last_line(tmp_path: Path) -> None:
    db = tmp_path / "cli.db"
    done = run(
        ["keys", "create", "--project", "shop", "--scopes", "ingest,read,admin"], db, tmp_path
    )
    assert done.returncode == 0, done.stderr
    token = done.stdout.rstrip("\n").splitlines()[-1]
    assert token and token == token.strip() and " " not in token
    with sqlite3.connect(db) as conn:
        stored = conn.execute(
            "SELECT t.token_hash, t.scopes FROM tokens t JOIN projects p"
            " ON p.id = t.project_id WHERE p.name = 'shop'"
        ).fetchall()
    assert stored == [(hash_token(token), "admin,ingest,read")]
    settings = Settings(database_url=f"sqlite:///{db}", jobs=False)
    with TestClient(create_app(settings, jobs=False)) as client:
        auth = {"Authorization": f"Bearer {token}"}
        body = model_body()
        assert client.post("/v1/models", json=body, headers=auth).status_code == 201
        r = client.post(
            f"/v1/models/{body['name']}/predictions",
            json={"predictions": predictions(2)},
            headers=auth,
        )
        assert r.json() == {"accepted": 2, "duplicates": 0}
        assert client.get("/v1/models", headers=auth).json()["items"][0]["name"] == body["name"]
        assert (
            client.get("/v1/models", headers={"Authorization": f"Bearer {token}x"}).status_code
            == 401
        )


def test_keys_create_with_bad_scopes_fails_with_a_message(tmp_path: Path) -> None:
    db = tmp_path / "cli.db"
    url = f"sqlite:///{db}"
    upgrade(url)
    engine = make_engine(url)
    with transaction(make_sessionmaker(engine)) as session:
        project = keys.get_or_create_project(session=session, name="shop")
        keys.create(session=session, project_id=project.id, scopes=["read"])
    engine.dispose()
    for scopes in ("ingest,write", ""):
        done = run(["keys", "create", "--project", "shop", "--scopes", scopes], db, tmp_path)
        assert done.returncode != 0
        assert "scopes" in done.stderr and "ingest, read, admin" in done.stderr, done.stderr
        assert done.stdout == ""
        assert token_count(db) == 1


@pytest.fixture()
def served(tmp_path: Path) -> Iterator[str]:
    """`belated serve` on a free loopback port and a fresh SQLite file, jobs off."""
    db = tmp_path / "serve.db"
    port = free_port()
    log = (tmp_path / "serve.log").open("w")
    proc = subprocess.Popen(
        [str(BELATED), "serve", "--port", str(port)],
        cwd=tmp_path,
        env=env_for(db, BELATED_JOBS="false"),
        stdout=log,
        stderr=subprocess.STDOUT,
    )
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            assert proc.poll() is None, (tmp_path / "serve.log").read_text()
            try:
                if httpx.get(f"{url}/healthz", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < deadline, "belated serve did not answer /healthz"
            time.sleep(0.1)
        yield url
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()
        log.close()


def test_serve_answers_over_http(served: str, tmp_path: Path) -> None:
    health = httpx.get(f"{served}/healthz", timeout=10).json()
    assert health["store"] == "up"
    assert health["jobs"]["enabled"] is False
    made = run(
        ["keys", "create", "--project", "shop", "--scopes", "admin,read"],
        tmp_path / "serve.db",
        tmp_path,
    )
    assert made.returncode == 0, made.stderr
    auth = {"Authorization": f"Bearer {made.stdout.splitlines()[-1]}"}
    body = model_body()
    r = httpx.post(f"{served}/v1/models", json=body, headers=auth, timeout=10)
    assert r.status_code == 201, r.text
    assert r.json()["name"] == body["name"]
    assert httpx.get(f"{served}/v1/models", timeout=10).status_code == 401
