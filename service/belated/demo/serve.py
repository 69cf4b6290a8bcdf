"""`belated demo`: the furniture-shop scenario in `./belated-demo.db` (or a given store),
served with its jobs.

The run is the same for the same seed: the story ends at today's midnight (UTC), the clock
of the process is held there while the data goes in and the rules are first evaluated, and
only then let go, so that neither the time of day nor the speed of the machine changes what
is raised.
"""

from __future__ import annotations

import errno
import socket
import threading
import time
from datetime import datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
from sqlalchemy import select
from sqlalchemy.engine import make_url

from belated.clock import clock
from belated.config import Settings
from belated.demo.feed import MODEL, feed
from belated.store import keys, model_registry
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.migrate import upgrade
from belated.store.tables import ModelRow

DEFAULT_FILE = "belated-demo.db"
PROJECT = "furniture-shop"


class DemoError(Exception):
    """Why the demo cannot start, in one line for the reader."""


def listen(port: int) -> socket.socket:
    """A listening socket on 127.0.0.1:port, or a DemoError at once when the port is taken."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(("127.0.0.1", port))
    except OSError as exc:
        sock.close()
        if exc.errno == errno.EADDRINUSE:
            raise DemoError(
                f"port {port} on 127.0.0.1 is already in use; choose another with --port "
                "(--port 0 takes any free port)"
            ) from None
        raise DemoError(f"cannot listen on 127.0.0.1:{port}: {exc.strerror}") from None
    sock.listen(128)
    return sock


def fresh_store(url: str | None, echo: Any) -> str:
    """The demo's store: `./belated-demo.db` unless a URL is given. A demo file left by an
    earlier run is removed (the demo always starts afresh); on another store, an earlier
    demo model is deleted."""
    if url is None:
        url = f"sqlite:///{Path.cwd() / DEFAULT_FILE}"
    parsed = make_url(url)
    if parsed.get_backend_name() == "sqlite":
        if not parsed.database or parsed.database == ":memory:":
            raise DemoError("the demo needs a SQLite file, not an in-memory database")
        path = Path(parsed.database).resolve()
        if path.exists():
            echo(f"an earlier demo file is at {path}: starting afresh (its data is replaced)")
        for suffix in ("", "-wal", "-shm", "-journal"):
            Path(f"{path}{suffix}").unlink(missing_ok=True)
        echo(f"the demo keeps its data in {path} (--database-url to choose another store)")
    return url


def _setup(url: str, echo: Any) -> tuple[str, str]:
    """Migrate the store, drop an earlier demo model; return an all-scopes and a read token."""
    upgrade(url)
    engine = make_engine(url)
    with transaction(make_sessionmaker(engine)) as session:
        project = keys.get_or_create_project(session=session, name=PROJECT)
        old = session.scalars(
            select(ModelRow).where(ModelRow.project_id == project.id, ModelRow.name == MODEL)
        ).first()
        if old is not None:
            echo(f"an earlier demo model {MODEL} is in this store: starting afresh")
            model_registry.delete(session=session, model=old)
        _, admin = keys.create(
            session=session,
            project_id=project.id,
            scopes=["admin", "ingest", "read"],
            name="demo loader",
        )
        _, read = keys.create(
            session=session, project_id=project.id, scopes=["read"], name="demo dashboard"
        )
    engine.dispose()
    return admin, read


def _wait_for_jobs(app: Any, timeout: float = 600) -> None:
    runner = app.app.state.jobs
    deadline = time.monotonic() + timeout
    start_runs = runner.runs
    while time.monotonic() < deadline:
        if runner.runs >= start_runs + 2 and runner.last.get("refresh", {}).get("buckets") == 0:
            return
        time.sleep(0.5)


def story_end(at: datetime) -> datetime:
    """Where the story ends: midnight (UTC) at the start of `at`'s day."""
    return at.replace(hour=0, minute=0, second=0, microsecond=0)


def run(
    *,
    days: int,
    seed: int,
    port: int,
    echo: Any,
    database_url: str | None = None,
    serve_forever: bool = True,
) -> None:
    """Build the demo, print the address, tokens and store, the progress and the alerts,
    then serve until interrupted."""
    import uvicorn

    from belated.app import create_app

    sock = listen(port)  # before anything else: a taken port fails at once
    bound = int(sock.getsockname()[1])
    url = fresh_store(database_url, echo)
    end = story_end(clock.now())
    clock.set(end)  # held until the rules are first evaluated (see the module docstring)
    try:
        admin, read = _setup(url, echo)
        settings = Settings(
            database_url=url, port=bound, host="127.0.0.1", refresh_seconds=3, jobs=True
        )
        app = create_app(settings)
        server = uvicorn.Server(
            uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on")
        )
        thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
        thread.start()
        while not server.started:
            if not thread.is_alive():
                raise DemoError("the demo server stopped before it started (see above)")
            time.sleep(0.05)
        base = f"http://127.0.0.1:{bound}"
        store = make_url(url)
        echo(f"url: {base}/")
        echo(f"token: {read}")
        echo(f"admin token: {admin}")
        echo(f"store: {store.database if store.get_backend_name() == 'sqlite' else store}")
        first = (end - timedelta(days=days)).date()
        echo(
            f"generating {days} days of furniture-shop orders ({first} to {end.date()}), "
            f"seed {seed}"
        )
        feed(base, admin, days, seed, end, echo)
        echo("waiting for the jobs to refresh the rollups and evaluate the rules...")
        _wait_for_jobs(app)
        _print_alerts(base, read, echo)
    finally:
        clock.set(None)
    if serve_forever:
        echo("serving until interrupted (Ctrl-C)")
        try:
            while thread.is_alive():
                thread.join(1)
        except KeyboardInterrupt:
            server.should_exit = True
            thread.join(10)


def _print_alerts(base: str, read: str, echo: Any) -> None:
    """One line per raised or noted alert, in a stable order."""
    auth = {"Authorization": f"Bearer {read}"}
    alerts = httpx.get(f"{base}/v1/alerts", headers=auth, params={"limit": 100}).json()["items"]
    rules = {
        r["id"]: r
        for r in httpx.get(f"{base}/v1/models/{MODEL}/rules", headers=auth).json()["items"]
    }
    lines = []
    for a in alerts:
        rule = rules.get(a["rule_id"], {})
        what = " ".join(x for x in (rule.get("kind"), rule.get("measure")) if x)
        first = min((b["window_start"] for b in a["breaches"] if b["breached"]), default="")
        lines.append(
            f"alert: {a['state']} {what} on {a['segment'] or 'all orders'}, "
            f"first breach in the window of {first[:10]}"
        )
    for line in sorted(lines):
        echo(line)
    if not alerts:
        echo("alert: none raised")
