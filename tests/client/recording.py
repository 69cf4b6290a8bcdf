"""Helpers of the recorder tests: what a spool directory holds, read straight from its files,
and an ASGI wrapper that notes every request the service answered."""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from belated.client.spool import FILE_NAME


def spool_files(directory: Path) -> list[Path]:
    """The batch files of a spool, oldest first (as named by the spool, never by its code)."""
    return sorted(p for p in directory.iterdir() if FILE_NAME.match(p.name))


def spool_items(directory: Path) -> list[dict[str, Any]]:
    """Every row kept in the spool, in order; each file must be whole JSON whose row count
    is the one its name says."""
    out: list[dict[str, Any]] = []
    for path in spool_files(directory):
        match = FILE_NAME.match(path.name)
        assert match is not None
        body = json.loads(path.read_bytes())
        items = body[match["kind"]]
        assert len(items) == int(match["rows"]), path.name
        out += items
    return out


def spool_bytes(directory: Path) -> int:
    """Bytes of the batch files of a spool."""
    return sum(p.stat().st_size for p in spool_files(directory))


@dataclass
class Noted:
    """An ASGI app wrapped so that every answered request is noted: method, path, status."""

    app: Any
    seen: list[tuple[str, str, int]] = field(default_factory=list)

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def noting(message: Any) -> None:
            if message["type"] == "http.response.start":
                self.seen.append((scope["method"], scope["path"], int(message["status"])))
            await send(message)

        await self.app(scope, receive, noting)

    def posts(self, path: str) -> list[int]:
        """The statuses answered to POSTs of `path`, in order."""
        return [status for method, p, status in self.seen if method == "POST" and p == path]
