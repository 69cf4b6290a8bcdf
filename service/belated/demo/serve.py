"""`belated demo`: the furniture-shop scenario on a fresh SQLite file, served with its jobs."""

from __future__ import annotations

import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import httpx

from belated.config import Settings
from belated.demo.feed import MODEL, feed
from belated.store import keys
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.migrate import upgrade


def _setup(url: str) -> tuple[str, str]:
    """Migrate the fresh store; return an all-scopes token and a read token."""
    upgrade(url)
    engine = make_engine(url)
    with transaction(make_sessionmaker(engine)) as session:
        project = keys.get_or_create_project(session=session, name="furniture-shop")
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


def run(*, days: int, seed: int, port: int, echo: Any, serve_forever: bool = True) -> None:
    """Build the demo, print the address, the read token and the alerts, then serve."""
    import uvicorn

    from belated.app import create_app

    folder = Path(tempfile.mkdtemp(prefix="belated-demo-"))
    url = f"sqlite:///{folder / 'demo.db'}"
    admin, read = _setup(url)
    settings = Settings(database_url=url, port=port, host="127.0.0.1", refresh_seconds=3, jobs=True)
    app = create_app(settings)
    server = uvicorn.Server(
        uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", access_log=False)
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    while not server.started:
        time.sleep(0.05)
    bound = int(server.servers[0].sockets[0].getsockname()[1])
    app.app.state.settings = settings.model_copy(update={"port": bound})
    base = f"http://127.0.0.1:{bound}"
    echo(f"generating {days} days of furniture-shop orders and sending them...", err=True)
    feed(base, admin, days, seed, echo)
    echo("waiting for the jobs to refresh the rollups and evaluate the rules...", err=True)
    _wait_for_jobs(app)
    echo(f"url: {base}/")
    echo(f"token: {read}")
    auth = {"Authorization": f"Bearer {read}"}
    alerts = httpx.get(f"{base}/v1/alerts", headers=auth, params={"limit": 100}).json()["items"]
    rules = {
        r["id"]: r
        for r in httpx.get(f"{base}/v1/models/{MODEL}/rules", headers=auth).json()["items"]
    }
    for a in sorted(alerts, key=lambda a: (a["segment"] or "", a["rule_id"])):
        rule = rules.get(a["rule_id"], {})
        what = " ".join(x for x in (rule.get("kind"), rule.get("measure")) if x)
        first = min((b["window_start"] for b in a["breaches"]), default="")
        echo(
            f"alert: {a['state']} {what} on {a['segment'] or 'all orders'}, "
            f"first breach in the window of {first[:10]} ({a['id']})"
        )
    if not alerts:
        echo("alert: none raised")
    if serve_forever:
        try:
            while thread.is_alive():
                thread.join(1)
        except KeyboardInterrupt:
            server.should_exit = True
            thread.join(10)
