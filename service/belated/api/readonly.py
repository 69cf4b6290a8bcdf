"""Read-only mode (`serve --read-only`): a replica that answers reads as they are and says
how stale they are.

Outermost ASGI layer: a request other than GET or HEAD is answered 405 (problem details,
`Allow: GET, HEAD`) before its body is read, so nothing reaches a route that writes; every
answer carries `X-Belated-Staleness`, the seconds since the start of the primary's last
complete refresh (store/staleness.py), absent while no refresh has completed.
"""

from __future__ import annotations

import math
import threading
import time
from typing import Any

import orjson
from fastapi.concurrency import run_in_threadpool
from sqlalchemy import Engine
from sqlalchemy.exc import SQLAlchemyError

from belated.api.problems import MEDIA
from belated.clock import clock
from belated.store import staleness

READ_METHODS = ("GET", "HEAD")
ALLOW = ", ".join(READ_METHODS)
HEADER = "X-Belated-Staleness"
# the dashboard's sign-in and sign-out only set or clear a cookie: the store is not written
COOKIE_ONLY = frozenset({"/signin", "/signout"})
# a request reads the store's freshness at most this often; the seconds are computed anew
CACHE_SECONDS = 1.0


class Freshness:
    """What the replica knows of its freshness, read from the store at most once a second."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self._lock = threading.Lock()
        self._read_at = -math.inf
        self._state: dict[str, Any] = {}

    def peek(self) -> dict[str, Any] | None:
        """The cached state while it is recent, else None (no query)."""
        with self._lock:
            fresh = time.monotonic() - self._read_at < CACHE_SECONDS
            return self._state if fresh else None

    def state(self) -> dict[str, Any]:
        """The recent state, read from the store when the cache is old; the last known one
        when the store does not answer (the route then answers 503 on its own)."""
        found = self.peek()
        if found is not None:
            return found
        try:
            with self.engine.connect() as conn:
                found = staleness.read(conn=conn)
        except SQLAlchemyError:
            with self._lock:
                return self._state
        with self._lock:
            self._state, self._read_at = found, time.monotonic()
        return found

    def report(self) -> dict[str, Any]:
        """The /healthz fields of a read-only replica."""
        state = self.state()
        return {
            "read_only": True,
            "staleness_seconds": staleness.seconds(state.get("refreshed_through"), clock.now()),
            "replay_lag_seconds": state.get("replay_lag_seconds"),
            "standby": state.get("in_recovery"),
        }


class ReadOnly:
    """ASGI middleware: refuse writes with 405, stamp every answer with its staleness."""

    def __init__(self, app: Any, freshness: Freshness) -> None:
        self.app = app
        self.freshness = freshness

    async def __call__(self, scope: dict[str, Any], receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = await self._staleness()
        if scope["method"] not in READ_METHODS and scope["path"] not in COOKIE_ONLY:
            await _refuse(send, scope["method"], headers)
            return

        head = scope["method"] == "HEAD"

        async def stamped(message: dict[str, Any]) -> None:
            if message["type"] == "http.response.start" and headers:
                message = {**message, "headers": [*message.get("headers", []), *headers]}
            elif head and message["type"] == "http.response.body":
                message = {**message, "body": b""}  # a HEAD is the GET without its body
            await send(message)

        # the routes declare GET only; a HEAD is answered as its GET (RFC 9110, 9.3.2)
        await self.app({**scope, "method": "GET"} if head else scope, receive, stamped)

    async def _staleness(self) -> list[tuple[bytes, bytes]]:
        state = self.freshness.peek()
        if state is None:
            state = await run_in_threadpool(self.freshness.state)
        seconds = staleness.seconds(state.get("refreshed_through"), clock.now())
        return [] if seconds is None else [(HEADER.lower().encode(), f"{seconds:.3f}".encode())]


async def _refuse(send: Any, method: str, headers: list[tuple[bytes, bytes]]) -> None:
    """A 405 problem straight from the middleware; the body was never read."""
    body = orjson.dumps(
        {
            "type": "about:blank",
            "title": "Method Not Allowed",
            "status": 405,
            "detail": f"this service is a read-only replica (serve --read-only): it answers"
            f" {' and '.join(READ_METHODS)} only; send the {method} to the primary."
            " Nothing was stored",
        }
    )
    await send(
        {
            "type": "http.response.start",
            "status": 405,
            "headers": [
                (b"content-type", MEDIA.encode()),
                (b"content-length", str(len(body)).encode()),
                (b"allow", ALLOW.encode()),
                # the request's body is left unread: this connection ends with the answer
                (b"connection", b"close"),
                *headers,
            ],
        }
    )
    await send({"type": "http.response.body", "body": body})


def wrap(app: Any, asgi: Any, engine: Engine) -> ReadOnly:
    """`asgi` behind the read-only layer; /healthz reads the same freshness (app.state)."""
    freshness = Freshness(engine)
    app.state.freshness = freshness
    return ReadOnly(asgi, freshness)
