"""The recorder's background thread: gathers rows into batches, sends, spills, drains.

Where a row goes:

    record_* ──put_nowait──> queue ──gather──> batch ──POST──> sent
                  │ full                         │ no connection, timeout, 408, 429, 5xx
                  v                              v
               dropped                 spool (in order) ──POST when due──> sent
                                                 │ full: the batch is held in memory and
                                                 │ nothing more is gathered; the queue fills
                                                 │ 4xx (409 too) ──> rejected/

While the spool holds anything, new batches join its tail, so batches reach the service in
the order they were recorded. Only this thread touches the spool and the held batches.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections import deque

import httpx
import orjson

from belated.client.attempt import SERVER_ERROR_LIMIT, Outcome, delay, post
from belated.client.gather import POLL, Row, batches, gather
from belated.client.spool import Batch, Spool
from belated.client.tally import Tally

log = logging.getLogger("belated.client.recorder")


class Sender:
    """The loop of the background thread."""

    def __init__(
        self,
        http: httpx.Client,
        rows: queue.Queue[Row],
        spool: Spool,
        tally: Tally,
        *,
        batch_size: int,
        flush_seconds: float,
        timeout: float,
        backoff: float,
        max_backoff: float,
    ) -> None:
        self.http = http
        self.rows = rows
        self.spool = spool
        self.tally = tally
        self.batch_size = batch_size
        self.flush_seconds = flush_seconds
        self.timeout = timeout
        self.backoff = backoff
        self.max_backoff = max_backoff
        self.held: deque[Batch] = deque()  # newer than the spool, waiting for room in it
        self.failures = 0
        self.server_errors = 0
        self.next_attempt = 0.0
        self.deadline = float("inf")  # set by stop(): when to give up sending
        self.stopping = threading.Event()
        self.outage_since: float | None = None
        with tally.lock:
            tally.spooled = spool.rows

    def stop(self, deadline: float) -> None:
        """Flush: send or spill what is queued, then end by `deadline` (time.monotonic)."""
        self.deadline = deadline
        self.stopping.set()

    def run(self) -> None:
        """Loop until stopped and flushed; never raises (errors are logged and counted)."""
        while True:
            try:
                if self._turn():
                    break
            except Exception as exc:  # never let the thread die: log, wait, go on
                log.exception("recorder: unexpected error in the sending thread")
                self._note(f"{type(exc).__name__}: {exc}")
                if self.stopping.is_set() and self._past_deadline():
                    break
                time.sleep(0.5)
        self._finish()

    # ---- one turn -------------------------------------------------------------------------

    def _turn(self) -> bool:
        """Drain if due, else gather and dispatch; True when the thread may end."""
        self._refill_spool()
        stopping = self.stopping.is_set()
        if self._backlog():
            if stopping and (self._past_deadline() or self.next_attempt >= self.deadline):
                return True  # no attempt left before the close timeout: keep the rest
            if time.monotonic() >= self.next_attempt:
                self._drain_one()
                if self.rows.qsize() >= self.batch_size and not self.held:
                    self._dispatch(self._gather(wait=False))  # keep the queue short meanwhile
                return False
            if self.held:  # the spool is full: gather nothing, so the queue fills and drops
                time.sleep(self._until_due())
                return False
        made = self._gather(wait=not stopping)
        self._dispatch(made)
        if stopping and not made:
            if not self._backlog():
                return True
            time.sleep(self._until_due())
        return False

    def _backlog(self) -> bool:
        return bool(self.spool.entries or self.held)

    def _past_deadline(self) -> bool:
        return time.monotonic() >= self.deadline

    def _until_due(self) -> float:
        return min(POLL, max(0.0, self.next_attempt - time.monotonic()))

    def _gather(self, *, wait: bool) -> list[Batch]:
        """Take a batch's worth of rows (see gather); with a backlog, wait no later than
        the next attempt."""
        backlog = self._backlog()
        taken = gather(
            self.rows,
            limit=self.batch_size,
            wait=wait,
            first_wait=self._until_due() if backlog else POLL,
            flush_seconds=self.flush_seconds,
            not_after=self.next_attempt if backlog else float("inf"),
            stopping=self.stopping,
        )
        if taken:
            with self.tally.lock:
                self.tally.in_hand += len(taken)
        return batches(taken)

    def _dispatch(self, made: list[Batch]) -> None:
        """Send each batch, or spill it while there is a backlog or a retry is not due."""
        for batch in made:
            if self._backlog() or time.monotonic() < self.next_attempt or self._past_deadline():
                self._spill(batch)
                continue
            outcome = self._post(batch)
            if outcome.verdict == "sent":
                self._count_sent(batch)
            elif outcome.verdict == "retry":
                self._spill(batch)
                self._failed(outcome)
            else:
                self._reject(batch, outcome)
                with self.tally.lock:
                    self.tally.in_hand -= batch.rows

    # ---- the backlog ----------------------------------------------------------------------

    def _spill(self, batch: Batch) -> None:
        """Put a batch at the tail of the spool, or hold it in memory when the spool is full."""
        if not self.held and self._spool_put(batch):
            return
        if not self.held:
            log.warning(
                "recorder: the spool is full (%d bytes); rows wait in memory and the newest "
                "are dropped once the queue is full too",
                self.spool.bytes,
            )
        self.held.append(batch)

    def _spool_put(self, batch: Batch) -> bool:
        try:
            kept = self.spool.put(batch)
        except OSError as exc:  # a full or read-only disk acts as a full spool
            self._note(f"spool: {exc}")
            return False
        if kept:
            with self.tally.lock:
                self.tally.in_hand -= batch.rows
                self.tally.spilled += batch.rows
                self.tally.spooled = self.spool.rows
        return kept

    def _refill_spool(self) -> None:
        """Move held batches into the spool as room appears, oldest first."""
        while self.held and self._spool_put(self.held[0]):
            self.held.popleft()

    def _drain_one(self) -> None:
        """Send the oldest batch of the backlog: the spool's head, else the first held."""
        from_spool = bool(self.spool.entries)
        if from_spool:
            try:
                head = self.spool.head()
            except OSError as exc:  # removed or unreadable: counted as lost, go on
                lost = self.spool.entries[0].rows
                self.spool.pop()
                self._sync_spooled()
                self.tally.drop(lost, f"spool: {exc}")
                log.warning("recorder: %d rows lost from the spool: %s", lost, exc)
                return
            assert head is not None
        else:
            head = self.held[0]
        outcome = self._post(head)
        if outcome.verdict == "retry":
            self._failed(outcome)
            return
        if from_spool:
            self.spool.pop()
            self._sync_spooled()
        else:
            self.held.popleft()
            with self.tally.lock:
                self.tally.in_hand -= head.rows
        if outcome.verdict == "sent":
            with self.tally.lock:
                self.tally.sent += head.rows
            self._recovered()
        else:
            self._reject(head, outcome)

    def _sync_spooled(self) -> None:
        with self.tally.lock:
            self.tally.spooled = self.spool.rows

    # ---- sending --------------------------------------------------------------------------

    def _post(self, batch: Batch) -> Outcome:
        """POST one batch; a 500 for the same batch SERVER_ERROR_LIMIT times in a row is
        a refusal."""
        # closing: no request outlives the close timeout
        timeout = max(0.05, min(self.timeout, self.deadline - time.monotonic()))
        outcome = post(self.http, batch, timeout)
        if outcome.status != 500:
            self.server_errors = 0
            return outcome
        self.server_errors += 1
        if self.server_errors < SERVER_ERROR_LIMIT:
            return outcome
        self.server_errors = 0
        return Outcome("reject", 500, outcome.problem, None, outcome.error)

    def _count_sent(self, batch: Batch) -> None:
        with self.tally.lock:
            self.tally.in_hand -= batch.rows
            self.tally.sent += batch.rows
        self._recovered()

    def _failed(self, outcome: Outcome) -> None:
        """Back off: exponential with jitter, or as long as Retry-After asks."""
        self.failures += 1
        wait = delay(outcome, self.failures, self.backoff, self.max_backoff)
        self.next_attempt = time.monotonic() + wait
        self._note(outcome.error)
        if self.outage_since is None:
            self.outage_since = time.monotonic()
            log.warning("recorder: %s; rows go to the spool and are retried", outcome.error)

    def _recovered(self) -> None:
        self.failures = 0
        self.next_attempt = 0.0
        if self.outage_since is not None and not self._backlog():
            log.info(
                "recorder: the service took the backlog, %.1f s after the first failure",
                time.monotonic() - self.outage_since,
            )
            self.outage_since = None

    def _reject(self, batch: Batch, outcome: Outcome) -> None:
        """Log once with the problem details and set the batch aside; never retried."""
        problem = outcome.problem or {}
        try:
            where = self.spool.set_aside(batch, outcome.status, problem)
        except OSError as exc:
            where = None
            self._note(f"rejected/: {exc}")
        log.warning(
            "recorder: %d %s for %r refused with %s, not retried%s: %s",
            batch.rows,
            batch.kind,
            batch.model,
            outcome.status,
            f" (kept in {where})" if where is not None else "",
            orjson.dumps(problem).decode(),
        )
        with self.tally.lock:
            self.tally.rejected += batch.rows
            self.tally.last_error = outcome.error

    def _note(self, error: str | None) -> None:
        with self.tally.lock:
            self.tally.last_error = error

    # ---- the end --------------------------------------------------------------------------

    def _finish(self) -> None:
        """At the end: what is still queued goes to the spool if it fits; what cannot be kept
        (held rows, and everything of a memory spool) is counted as dropped."""
        while not self.rows.empty():
            self._dispatch(self._gather(wait=False))
        self._refill_spool()
        held = sum(b.rows for b in self.held)
        self.held.clear()
        lost = held
        if self.spool.directory is None:
            lost += self.spool.rows
            while self.spool.entries:
                self.spool.pop()
        with self.tally.lock:
            self.tally.in_hand -= held
            self.tally.spooled = self.spool.rows
            self.tally.dropped += lost
        if lost:
            log.warning("recorder: closed with %d rows that could not be kept", lost)
