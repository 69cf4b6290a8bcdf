"""A body-size limit enforced on the bytes actually received, not on Content-Length."""

from __future__ import annotations

from typing import Any, cast

import orjson

from belated.api.problems import MEDIA

Scope = dict[str, Any]


class BodyLimit:
    """ASGI middleware: refuse (413) a body over `limit` bytes after reading at most that many."""

    def __init__(self, app: Any, limit: int, shortcut: Any = None) -> None:
        self.app = app
        self.limit = limit
        # answers some requests itself once the body is read (api/fastpath.py)
        self.shortcut = shortcut

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        if b"%00" in scope.get("query_string", b"") or "\x00" in scope.get("path", ""):
            await self._nul(send, (None, "query"))
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
        body = b"".join(chunks)
        binary = _binary(scope)  # Arrow and Parquet uploads hold NUL bytes by nature
        if not binary and (b"\\u0000" in body or b"\x00" in body):
            where = _nul_path(body)  # PostgreSQL text cannot hold NUL; refuse it everywhere
            if where is not None:
                await self._nul(send, where)
                return
        if self.shortcut is not None and await self.shortcut(scope, body, send):
            return
        await self.app(scope, _replay([body], None, receive), send)

    async def _nul(self, send: Any, where: tuple[int | None, str]) -> None:
        index, field = where
        await _send_problem(
            send,
            422,
            "Invalid input",
            f"field '{field}'{f' of item {index}' if index is not None else ''} contains the "
            "NUL character (\\u0000), which no string may hold; nothing was stored",
            errors=[{"index": index, "field": field, "reason": "contains the NUL character"}],
        )

    async def _refuse(self, send: Any) -> None:
        await _send_problem(
            send,
            413,
            "Payload too large",
            f"the request body exceeds {self.limit} bytes "
            "(BELATED_MAX_BODY_BYTES); nothing was stored",
        )


_BINARY = (b"application/vnd.apache.arrow.stream", b"application/vnd.apache.parquet")


def _binary(scope: Scope) -> bool:
    """Whether the request declares a binary body (a rollup upload), not text."""
    declared = dict(scope.get("headers") or []).get(b"content-type", b"")
    return declared.split(b";")[0].strip().lower() in _BINARY


def _nul_path(body: bytes) -> tuple[int | None, str] | None:
    """(item index, field) of the first string or key holding NUL; None if none does."""
    try:
        doc = orjson.loads(body)
    except orjson.JSONDecodeError:
        return (None, "body") if b"\x00" in body else None

    def walk(node: Any, path: list[str | int]) -> list[str | int] | None:
        if isinstance(node, str):
            return path if "\x00" in node else None
        items = (
            node.items()
            if isinstance(node, dict)
            else (enumerate(node) if isinstance(node, list) else ())
        )
        for key, value in items:
            if isinstance(key, str) and "\x00" in key:
                return [*path, key]
            found = walk(value, [*path, key])
            if found is not None:
                return found
        return None

    path = walk(doc, [])
    if path is None:
        return None
    index = next((p for p in path if isinstance(p, int)), None)
    field = (
        ".".join(
            str(p) for p in path if not isinstance(p, int) and p not in ("predictions", "labels")
        )
        or "body"
    )
    return index, field


async def _send_problem(
    send: Any, status: int, title: str, detail: str, errors: list[dict[str, Any]] | None = None
) -> None:
    """Answer with problem details straight from the middleware."""
    doc: dict[str, Any] = {
        "type": "about:blank",
        "title": title,
        "status": status,
        "detail": detail,
    }
    if errors:
        doc["errors"] = errors
    body = orjson.dumps(doc)
    await send(
        {
            "type": "http.response.start",
            "status": status,
            "headers": [
                (b"content-type", MEDIA.encode()),
                (b"content-length", str(len(body)).encode()),
                (b"connection", b"close"),
            ],
        }
    )
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
        return cast(dict[str, Any], await upstream())

    return receive
