"""The recorder: predictions and labels from a live system, one at a time, never in its way.

    from belated.client import Recorder
    recorder = Recorder("http://belated:8000", token, spool_dir="/var/spool/belated")
    recorder.record_prediction("returns-v2", order.id, order.ts, score=p, tags={"channel": "web"})
    recorder.record_label("returns-v2", order.id, 1)   # when the return comes in
    recorder.close()                                  # or a `with` block, or interpreter exit

A `record_*` call builds one small dict and puts it on a bounded queue: it never waits on
the network or the disk and never raises (bad arguments and rows that find the queue full
are counted in `stats().dropped`). A background thread sends batches and keeps whatever the
service cannot take in the spool (see `belated.client.sender` for the path of a row).
"""

from __future__ import annotations

import logging
import queue
import re
import threading
import time
import weakref
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, date, datetime
from typing import Any

import httpx

from belated.client.gather import Row
from belated.client.rows import plain, rfc3339
from belated.client.sender import Sender
from belated.client.spool import Spool
from belated.client.tally import Tally

log = logging.getLogger("belated.client.recorder")

MODEL_NAME = re.compile(r"[a-z0-9][a-z0-9._-]{0,63}")  # the API's model names, safe in file names
CLOSE_GRACE = 2.0  # seconds beyond the close timeout for the thread to write what is left


@dataclass(frozen=True, slots=True)
class RecorderStats:
    """Rows by where they are: `queued` in memory now, `spooled` in the spool now; `sent`
    (acknowledged), `spilled` (ever written to the spool), `dropped` and `rejected` since
    the start. Every row recorded is counted once among queued, spooled, sent, dropped and
    rejected (a snapshot taken while a batch moves may miss it for an instant)."""

    queued: int
    sent: int
    spilled: int
    spooled: int
    dropped: int
    rejected: int
    last_error: str | None


def _stamp(ts: datetime | date | str | None) -> str:
    if ts is None:
        return rfc3339(datetime.now(UTC))
    return ts if isinstance(ts, str) else rfc3339(ts)


def _class(value: Any) -> str | int:
    value = plain(value)
    if isinstance(value, bool) or not isinstance(value, str | int):
        raise TypeError(f"a class is a string or an integer, not {type(value).__name__}")
    return value


def _shutdown(
    sender: Sender, thread: threading.Thread, http: httpx.Client, spool: Spool, timeout: float
) -> None:
    """Flush and stop: the body of close(), also run by weakref.finalize at exit."""
    sender.stop(time.monotonic() + timeout)
    thread.join(timeout + CLOSE_GRACE)
    if thread.is_alive():
        log.warning("recorder: the sending thread is still busy after %.1f s", timeout)
        return  # it still uses the client and the spool; the process ends soon anyway
    http.close()
    spool.close()


class Recorder:
    """Record predictions and labels from a live system; sent in batches in the background.

    `spool_dir`: where batches wait while the service is unreachable (kept in memory when
    None, and lost with the process); `spool_max_bytes` bounds it (and rejected/ apart).
    `batch_size` rows or `flush_seconds` make a batch; `queue_size` rows wait in memory.
    Retries back off exponentially from `backoff` seconds up to `max_backoff`, with jitter,
    or as long as a Retry-After asks. `close_timeout` bounds the flush at interpreter exit.
    """

    def __init__(
        self,
        url: str,
        token: str,
        *,
        spool_dir: str | None = None,
        spool_max_bytes: int = 64 * 2**20,
        batch_size: int = 1_000,
        flush_seconds: float = 1.0,
        queue_size: int = 100_000,
        timeout: float = 10.0,
        backoff: float = 0.2,
        max_backoff: float = 30.0,
        close_timeout: float = 5.0,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        if batch_size < 1 or queue_size < 1 or flush_seconds <= 0:
            raise ValueError("batch_size and queue_size must be positive, flush_seconds above 0")
        self._queue: queue.Queue[Row] = queue.Queue(maxsize=queue_size)
        self._tally = Tally(threading.Lock())
        self._closed = False
        self._spool = Spool(spool_dir, spool_max_bytes)
        self._http = httpx.Client(
            base_url=url.rstrip("/"),
            timeout=timeout,
            transport=transport,
            headers={
                "Authorization": f"Bearer {token}",
                "Content-Type": "application/json",
                "User-Agent": "belated-recorder",
            },
        )
        self._sender = Sender(
            self._http,
            self._queue,
            self._spool,
            self._tally,
            batch_size=batch_size,
            flush_seconds=flush_seconds,
            timeout=timeout,
            backoff=backoff,
            max_backoff=max_backoff,
        )
        # A daemon thread, flushed by the finalizer: Python joins non-daemon threads before
        # it runs atexit hooks, so a non-daemon sender would hold the process open forever.
        self._thread = threading.Thread(
            target=self._sender.run, name="belated-recorder", daemon=True
        )
        self._thread.start()
        self._finalizer = weakref.finalize(
            self, _shutdown, self._sender, self._thread, self._http, self._spool, close_timeout
        )

    def __enter__(self) -> Recorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _offer(self, model: str, kind: str, item: dict[str, Any]) -> bool:
        if self._closed:
            self._tally.drop(1, "recorded after close()")
            return False
        if not isinstance(model, str) or MODEL_NAME.fullmatch(model) is None:
            self._tally.drop(1, f"not a model name: {str(model)[:80]!r}")
            return False
        try:
            self._queue.put_nowait((model, kind, item))
        except queue.Full:
            self._tally.drop(1)
            return False
        return True

    def record_prediction(
        self,
        model: str,
        id: str | int,  # the API names it so
        ts: datetime | date | str | None = None,
        *,
        score: float | None = None,
        scores: Mapping[str, float] | None = None,
        predicted: str | int | None = None,
        tags: Mapping[str, str | int | float] | None = None,
    ) -> bool:
        """Queue one prediction (`ts` None: now); False when it was dropped. Never raises."""
        try:
            item: dict[str, Any] = {"id": id if isinstance(id, str) else str(id), "ts": _stamp(ts)}
            if score is not None:
                item["score"] = float(score)
            if scores is not None:
                item["scores"] = {str(k): float(v) for k, v in scores.items()}
            if predicted is not None:
                item["predicted"] = _class(predicted)
            if tags:
                item["tags"] = {
                    str(k): v if isinstance(v, str) else str(v) for k, v in tags.items()
                }
            return self._offer(model, "predictions", item)
        except Exception as exc:  # never into the caller: counted, and readable in stats()
            self._tally.drop(1, f"record_prediction: {type(exc).__name__}: {exc}")
            return False

    def record_label(
        self,
        model: str,
        id: str | int,
        actual: str | int,
        ts: datetime | date | str | None = None,
    ) -> bool:
        """Queue one label (`ts` None: now, the time it was known, even if it is sent later
        from the spool); False when it was dropped. Never raises."""
        try:
            item = {
                "id": id if isinstance(id, str) else str(id),
                "actual": _class(actual),
                "ts": _stamp(ts),
            }
            return self._offer(model, "labels", item)
        except Exception as exc:
            self._tally.drop(1, f"record_label: {type(exc).__name__}: {exc}")
            return False

    def stats(self) -> RecorderStats:
        """Where the recorded rows are now, and the last error seen."""
        t = self._tally
        with t.lock:
            return RecorderStats(
                queued=self._queue.qsize() + t.in_hand,
                sent=t.sent,
                spilled=t.spilled,
                spooled=t.spooled,
                dropped=t.dropped,
                rejected=t.rejected,
                last_error=t.last_error,
            )

    def close(self, timeout: float = 5.0) -> RecorderStats:
        """Send what is queued and spooled for up to `timeout` seconds, keep the rest in the
        spool for the next start, and stop; later records are dropped. Answers the stats."""
        self._closed = True
        if self._finalizer.alive:
            self._finalizer.detach()
            _shutdown(self._sender, self._thread, self._http, self._spool, timeout)
        return self.stats()
