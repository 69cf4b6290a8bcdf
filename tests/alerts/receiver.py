"""A real webhook receiver on a loopback port that verifies every signature with the
`standardwebhooks` package (a reference implementation of the open specification)."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

from standardwebhooks import Webhook


class Receiver:
    """Collects verified events; `respond` decides each answer (status, extra headers)."""

    def __init__(self, respond: Callable[[int], tuple[int, dict[str, str]]] | None = None):
        self.secret: str | None = None
        self.events: list[dict[str, Any]] = []
        self.ids: list[str] = []
        self.rejected = 0
        self.calls = 0
        self.respond = respond or (lambda _n: (200, {}))
        self.lock = threading.Lock()
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:  # noqa: N802
                body = self.rfile.read(int(self.headers.get("content-length", 0)))
                with outer.lock:
                    outer.calls += 1
                    status, extra = outer.respond(outer.calls)
                    if 200 <= status < 300:
                        try:
                            headers = {k.lower(): v for k, v in self.headers.items()}
                            payload = Webhook(outer.secret or "").verify(body, headers)
                        except Exception:
                            outer.rejected += 1
                            status = 400
                        else:
                            outer.events.append(payload)
                            outer.ids.append(self.headers["webhook-id"])
                self.send_response(status)
                for k, v in extra.items():
                    self.send_header(k, v)
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_port}/hooks/belated"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> Receiver:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()

    def unique(self) -> list[dict[str, Any]]:
        """Verified events deduplicated by webhook-id, in arrival order."""
        seen: set[str] = set()
        out = []
        for msg_id, event in zip(self.ids, self.events, strict=True):
            if msg_id not in seen:
                seen.add(msg_id)
                out.append(event)
        return out

    def wait_for(self, n: int, timeout: float = 30.0) -> bool:
        """Wait until n unique events arrived."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if len(self.unique()) >= n:
                return True
            time.sleep(0.05)
        return False


def dumps(event: dict[str, Any]) -> str:
    """Stable text of an event, for comparisons."""
    return json.dumps(event, sort_keys=True)
