"""A body-size limit enforced on the bytes actually received, not on Content-Length."""

from __future__ import annotations

from typing import Any

import orjson

from belated.api.problems import MEDIA

Scope = dict[str, Any]


class BodyLimit:
    """ASGI middleware: refuse (413) a body over `limit` bytes after reading at most that many."""

    def __init__(self, app: Any, limit: int) -> None:
        self.app = app
        self.limit = limit

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = dict(scope.get("headers") or []).get(b"content-length")
        if declared is not None and declared.isdigit() and int(declared) > self.limit:
            await self._refuse(send)
            return
        # Read the whole body first (bounded by the limit), then replay it to the app: the
        # app never sees a partial body and a refusal never follows a started response.
        chunks: list[bytes] = []
        received = 0
        more = True
        while more:
            message = await receive()
            if message["type"] != "http.request":
                await self.app(scope, _replay([], message, receive), send)
                return
            chunk = message.get("body", b"")
            received += len(chunk)
            if received > self.limit:
                await self._refuse(send)
                return
            chunks.append(chunk)
            more = message.get("more_body", False)
        await self.app(scope, _replay(chunks, None, receive), send)

    async def _refuse(self, send: Any) -> None:
        body = orjson.dumps({
            "type": "about:blank", "title": "Payload too large", "status": 413,
            "detail": f"the request body exceeds {self.limit} bytes (BELATED_MAX_BODY_BYTES); "
                      "nothing was stored",
        })
        await send({"type": "http.response.start", "status": 413,
                    "headers": [(b"content-type", MEDIA.encode()),
                                (b"content-length", str(len(body)).encode()),
                                (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": body})


def _replay(chunks: list[bytes], tail: dict[str, Any] | None, upstream: Any) -> Any:
    """A receive callable that yields the buffered body, then defers to the server."""
    body = b"".join(chunks)
    sent = False

    async def receive() -> dict[str, Any]:
        nonlocal sent
        if not sent:
            sent = True
            if tail is not None:
                return tail
            return {"type": "http.request", "body": body, "more_body": False}
        return await upstream()

    return receive
