"""`belated demo`: the furniture-shop scenario on a fresh SQLite file, served with its jobs."""

from __future__ import annotations

import tempfile
import threading
import time
from datetime import timedelta
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import httpx

from belated import demo_data
from belated.clock import now
from belated.config import Settings
from belated.store import keys
from belated.store.db import make_engine, make_sessionmaker, transaction
from belated.store.migrate import upgrade

MODEL = "returns-v2"


def rules(reference_start: str, reference_end: str) -> list[dict[str, Any]]:
    """Sensible rules for the shop: label-based drops and label-free shifts against a fixed
    reference month, traffic and label stalls."""
    reference = {"start": reference_start, "end": reference_end}
    return [
        {
            "kind": "drop",
            "measure": "recall",
            "segment_by": "region",
            "tolerance": 0.05,
            "alpha": 0.01,
            "min_support": 30,
            "baseline": reference,
            "clear_after": 3,
        },
        {
            "kind": "drop",
            "measure": "precision",
            "segment_by": "region",
            "tolerance": 0.05,
            "alpha": 0.01,
            "min_support": 30,
            "baseline": reference,
            "clear_after": 3,
        },
        {
            "kind": "shift",
            "measure": "positive_rate",
            "segment_by": "region",
            "threshold": 0.05,
            "alpha": 0.001,
            "baseline": reference,
            "clear_after": 3,
        },
        {"kind": "shift", "measure": "score_psi", "threshold": 0.1, "baseline": reference},
        {"kind": "traffic", "low": 200},
        {"kind": "stall", "max_silence_hours": 48},
    ]


class _Sink(BaseHTTPRequestHandler):
    """A local webhook receiver that keeps what it gets (the demo prints nothing of it)."""

    received: list[bytes] = []

    def do_POST(self) -> None:  # noqa: N802
        self.received.append(self.rfile.read(int(self.headers.get("content-length", 0))))
        self.send_response(204)
        self.end_headers()

    def log_message(self, *args: Any) -> None:
        pass


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


def _feed(base: str, token: str, days: int, seed: int, echo: Any) -> None:
    """Create the model, rules and webhook; send 90 days of orders and their outcomes."""
    http = httpx.Client(base_url=base, headers={"Authorization": f"Bearer {token}"}, timeout=120)
    http.post(
        "/v1/models",
        json={
            "name": MODEL,
            "label_delay_days": 30,
            "min_coverage": 0.9,
            "threshold": 0.3,
            "segment_keys": ["channel", "region"],
        },
    ).raise_for_status()
    sink = ThreadingHTTPServer(("127.0.0.1", 0), _Sink)
    threading.Thread(target=sink.serve_forever, daemon=True).start()
    http.post(
        "/v1/webhooks", json={"url": f"http://127.0.0.1:{sink.server_port}/returns-alerts"}
    ).raise_for_status()
    current = now()
    first = current - timedelta(days=days)
    reference = (
        first + timedelta(days=demo_data.CHANGE_DAY - 30),
        first + timedelta(days=demo_data.CHANGE_DAY - 2),
    )
    preds, labels = [], []
    for order in demo_data.orders(days=days, seed=seed, end=current):
        preds.append(demo_data.prediction(order))
        if order.outcome_at is not None and order.outcome_at <= current:
            labels.append(demo_data.label(order))
    for i in range(0, len(preds), 10_000):
        http.post(
            f"/v1/models/{MODEL}/predictions", json={"predictions": preds[i : i + 10_000]}
        ).raise_for_status()
    for i in range(0, len(labels), 10_000):
        http.post(
            f"/v1/models/{MODEL}/labels", json={"labels": labels[i : i + 10_000]}
        ).raise_for_status()
    # rules come last, so that no evaluation sees the history half sent
    for rule in rules(reference[0].isoformat(), reference[1].isoformat()):
        http.post(f"/v1/models/{MODEL}/rules", json=rule).raise_for_status()
    echo(f"sent {len(preds)} orders and {len(labels)} outcomes", err=True)


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
    _feed(base, admin, days, seed, echo)
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
