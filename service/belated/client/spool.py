"""The recorder's spool: batches kept in order while the service cannot take them.

On disk (a `spool_dir`) each batch is one file named `<seq>-<rows>-<kind>-<model>.json` that
holds exactly the request body, `{"predictions": [...]}` or `{"labels": [...]}`. A file is
written to a hidden temporary name, fsynced, renamed into place and the directory fsynced, so
a process killed at any instant leaves either the whole batch or nothing; temporary leftovers
of a killed process are removed when the next one opens the spool. Files are sent and removed
in the order of `seq`, which carries on across processes. Without a directory the batches are
kept in memory, under the same bound.

Batches the service refused for good go to `rejected/`: the body as `<name>.json` beside
`<name>.problem.json` with the status and the problem details, for a person to read, fix and
re-send (`curl --data @<name>.json .../v1/models/<model>/<kind>`).

One process at a time owns a spool directory (an exclusive `flock` on its `.lock` file, which
the kernel releases when the process dies, however it dies).
"""

from __future__ import annotations

import fcntl
import logging
import os
import re
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import orjson

log = logging.getLogger("belated.client.recorder")

KINDS = ("predictions", "labels")
FILE_NAME = re.compile(
    r"^(?P<seq>\d{16})-(?P<rows>\d+)-(?P<kind>predictions|labels)-(?P<model>[a-z0-9][a-z0-9._-]{0,63})\.json$"
)
TEMP_PREFIX = ".tmp-"
REJECTED = "rejected"


@dataclass(frozen=True, slots=True)
class Batch:
    """One request: the rows of one kind for one model, encoded as the request body."""

    model: str
    kind: str
    rows: int
    body: bytes

    @classmethod
    def of(cls, model: str, kind: str, items: list[dict[str, Any]]) -> Batch:
        """The batch of these items, encoded."""
        return cls(model, kind, len(items), orjson.dumps({kind: items}, default=str))

    @property
    def path(self) -> str:
        """The API path the batch is posted to."""
        return f"/v1/models/{self.model}/{self.kind}"


@dataclass(slots=True)
class _Entry:
    seq: int
    batch: Batch | None  # in memory; None when the body lives in `file`
    model: str
    kind: str
    rows: int
    size: int
    file: Path | None

    @property
    def name(self) -> str:
        return f"{self.seq:016d}-{self.rows}-{self.kind}-{self.model}.json"


class SpoolInUse(RuntimeError):
    """Another live process owns the spool directory."""


def write_atomic(path: Path, data: bytes) -> None:
    """Write a file whole or not at all: temporary name, fsync, rename, fsync the directory."""
    temp = path.with_name(TEMP_PREFIX + path.name)
    fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view) :]
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(temp, path)
    except BaseException:
        temp.unlink(missing_ok=True)  # a full disk leaves no half file behind
        raise
    _fsync_dir(path.parent)


def _fsync_dir(directory: Path) -> None:
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class Spool:
    """Batches in order, on disk under `directory` (or in memory), at most `max_bytes` of
    bodies; only the recorder's sending thread calls it."""

    def __init__(self, directory: str | os.PathLike[str] | None, max_bytes: int) -> None:
        self.max_bytes = max_bytes
        self.directory = None if directory is None else Path(directory)
        self.entries: deque[_Entry] = deque()
        self.bytes = 0
        self.rows = 0
        self.rejected_bytes = 0
        self._next_seq = 1
        self._lock_fd: int | None = None
        if self.directory is not None:
            self._open(self.directory)

    def _open(self, directory: Path) -> None:
        (directory / REJECTED).mkdir(parents=True, exist_ok=True)
        fd = os.open(directory / ".lock", os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise SpoolInUse(
                f"{directory} is the spool of another running process; give each process a "
                "spool directory of its own"
            ) from None
        self._lock_fd = fd
        found: list[_Entry] = []
        for path in directory.iterdir():
            if path.name.startswith(TEMP_PREFIX):
                path.unlink(missing_ok=True)  # a write cut short by a killed process
                continue
            match = FILE_NAME.match(path.name)
            if match is None:
                continue
            size = path.stat().st_size
            found.append(
                _Entry(
                    int(match["seq"]),
                    None,
                    match["model"],
                    match["kind"],
                    int(match["rows"]),
                    size,
                    path,
                )
            )
        found.sort(key=lambda e: e.seq)
        for entry in found:
            self._add(entry)
        self._next_seq = found[-1].seq + 1 if found else 1
        for path in (directory / REJECTED).iterdir():
            self.rejected_bytes += path.stat().st_size
        if found:
            log.info(
                "spool %s: %d rows left by an earlier process, sent first", directory, self.rows
            )

    def _add(self, entry: _Entry) -> None:
        self.entries.append(entry)
        self.bytes += entry.size
        self.rows += entry.rows

    def __len__(self) -> int:
        return len(self.entries)

    def put(self, batch: Batch) -> bool:
        """Keep a batch at the tail; False when it does not fit under `max_bytes`."""
        if self.bytes + len(batch.body) > self.max_bytes:
            return False
        entry = _Entry(
            self._next_seq, batch, batch.model, batch.kind, batch.rows, len(batch.body), None
        )
        if self.directory is not None:
            entry.file = self.directory / entry.name
            write_atomic(entry.file, batch.body)
            entry.batch = None  # read back when its turn comes: memory holds the queue only
        self._next_seq += 1
        self._add(entry)
        return True

    def head(self) -> Batch | None:
        """The oldest batch, read back from its file if it is on disk."""
        if not self.entries:
            return None
        entry = self.entries[0]
        if entry.batch is not None:
            return entry.batch
        assert entry.file is not None
        return Batch(entry.model, entry.kind, entry.rows, entry.file.read_bytes())

    def pop(self) -> None:
        """Forget the oldest batch (sent or set aside)."""
        entry = self.entries.popleft()
        self.bytes -= entry.size
        self.rows -= entry.rows
        if entry.file is not None:
            # No directory fsync: if the removal is lost in a crash, the batch is sent again
            # and counted as duplicates.
            entry.file.unlink(missing_ok=True)

    def set_aside(self, batch: Batch, status: int | None, problem: dict[str, Any]) -> Path | None:
        """Write a refused batch to rejected/ with its problem details; its path, or None
        when there is no directory or rejected/ has reached `max_bytes` too."""
        if self.directory is None:
            return None
        note = orjson.dumps(
            {
                "model": batch.model,
                "kind": batch.kind,
                "path": batch.path,
                "rows": batch.rows,
                "status": status,
                "problem": problem,
                "refused_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
                "resend": f"POST {batch.path} with the body in the .json file beside this one",
            },
            option=orjson.OPT_INDENT_2,
        )
        if self.rejected_bytes + len(batch.body) + len(note) > self.max_bytes:
            return None
        name = f"{self._next_seq:016d}-{batch.rows}-{batch.kind}-{batch.model}"
        self._next_seq += 1
        folder = self.directory / REJECTED
        write_atomic(folder / f"{name}.problem.json", note)
        write_atomic(folder / f"{name}.json", batch.body)
        self.rejected_bytes += len(batch.body) + len(note)
        return folder / f"{name}.json"

    def close(self) -> None:
        """Let another process own the directory."""
        if self._lock_fd is not None:
            os.close(self._lock_fd)
            self._lock_fd = None
