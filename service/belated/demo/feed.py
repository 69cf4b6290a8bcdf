"""What the demo loads into the service: the returns model, a webhook to a local receiver,
the orders and their outcomes, then the shop's alert rules."""

from __future__ import annotations

import threading
import time
from datetime import datetime, timedelta
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import httpx

from belated.demo import shop

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


BATCH = 10_000


def _send(http: httpx.Client, path: str, key: str, rows: list[Any], echo: Any) -> None:
    """Post the rows in batches, printing rows sent and rows per second after each."""
    t0 = time.perf_counter()
    for i in range(0, len(rows), BATCH):
        http.post(path, json={key: rows[i : i + BATCH]}).raise_for_status()
        done = min(i + BATCH, len(rows))
        rate = done / max(time.perf_counter() - t0, 1e-9)
        echo(f"sending {key}: {done:,} of {len(rows):,} rows ({rate:,.0f} rows/s)")


def feed(base: str, token: str, days: int, seed: int, end: datetime, echo: Any) -> None:
    """Create the model, rules and webhook; send the days of orders ending at `end` and the
    outcomes learnt by then."""
    http = httpx.Client(base_url=base, headers={"Authorization": f"Bearer {token}"}, timeout=120)
    http.post(
        "/v1/models",
        json={
            "name": MODEL,
            "label_delay_days": 30,
            # the story back-fills `days` of history at once: raw rows older than the
            # default retention would be dropped by the jobs while later batches still
            # arrive for those days (then refused as past retention)
            "keep_raw_days": days + 30,
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
    first = end - timedelta(days=days)
    reference = (
        first + timedelta(days=shop.CHANGE_DAY - 30),
        first + timedelta(days=shop.CHANGE_DAY - 2),
    )
    preds, labels = [], []
    for order in shop.orders(days=days, seed=seed, end=end):
        preds.append(shop.prediction(order))
        if order.outcome_at is not None and order.outcome_at <= end:
            labels.append(shop.label(order))
    _send(http, f"/v1/models/{MODEL}/predictions", "predictions", preds, echo)
    _send(http, f"/v1/models/{MODEL}/labels", "labels", labels, echo)
    # rules come last, so that no evaluation sees the history half sent
    for rule in rules(reference[0].isoformat(), reference[1].isoformat()):
        http.post(f"/v1/models/{MODEL}/rules", json=rule).raise_for_status()
    echo(f"sent {len(preds):,} orders and {len(labels):,} outcomes")
    # what the shop knew on the day: a dated note on every chart of the model page
    change = first + timedelta(days=shop.CHANGE_DAY)
    note = "new sofa supplier delivering in the north"
    http.post(
        f"/v1/models/{MODEL}/markers", json={"at": change.isoformat(), "text": note}
    ).raise_for_status()
    echo(f"marker: {change:%Y-%m-%d} {note}")
