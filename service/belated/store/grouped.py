"""Group commit for small batches of predictions and labels: many requests, one transaction.

A live system sends one prediction a request from many threads. Each request alone would pay
a transaction, a commit and its round trips for one row; here concurrent small batches queue
up while the previous transaction commits, and a writer thread stores them together:

    request --validated--> queue --> writer thread, one transaction for all that wait:
       ^                                predictions: one INSERT ... FROM unnest(arrays) for
       |                                  every row, marking their hours (SQLite: a look-up
       |                                  and one executemany);
       |                                labels: each model's batches applied in arrival
       |                                  order, as one; then the hours are held (dirty.py)
       |                                         |
       +---- answered once committed <-------- commit (a 2xx still means stored)

Each request stays all or nothing. An id stored earlier with other content, or sent by two
batches of one group with different content, sends the whole group back to be stored batch
by batch (the ordinary path, which answers the conflicting batch 409 and stores the others);
so does any error of the store, so that each batch gets its own answer. Predictions are
stored before labels within a group: a label that raced its prediction is matched at once
rather than left pending, which is one of the orders the two requests could have had.
"""

from __future__ import annotations

import logging
import queue
import threading
from collections.abc import Callable
from concurrent.futures import Future
from dataclasses import dataclass, field
from datetime import datetime
from functools import partial
from typing import Any

from sqlalchemy.orm import Session, sessionmaker

from belated.ingest.validate import PredictionIn
from belated.store import bulk, dirty, labels, partitions, predictions, raw_retention
from belated.store.db import transaction
from belated.store.dialect import is_postgres

log = logging.getLogger(__name__)
SMALL_BATCH = 200  # batches up to this many predictions are grouped
MAX_GROUP_ROWS = 5000
IDLE_SECONDS = 30.0


@dataclass(slots=True)
class Batch:
    """One request's validated predictions (or labels), waiting to be stored."""

    model_id: int
    items: list[Any]  # PredictionIn, or LabelIn when kind is "labels"
    batch_size: int
    received: datetime
    kind: str = "predictions"
    done: Future[dict[str, int]] = field(default_factory=Future)


class Busy(Exception):
    """The queue is full: the store is not keeping up (the caller answers 503)."""


class GroupWriter:
    """A bounded queue of small batches and the thread(s) that store them in groups."""

    def __init__(
        self, sessions: sessionmaker[Session], *, threads: int = 4, max_queued: int = 2000
    ) -> None:
        self.sessions = sessions
        self.threads = threads
        self.queue: queue.Queue[Batch] = queue.Queue(maxsize=max_queued)
        self._lock = threading.Lock()
        self._running: list[threading.Thread] = []

    def submit(self, batch: Batch) -> Future[dict[str, int]]:
        """Queue a batch; its future answers accepted and duplicates once committed."""
        try:
            self.queue.put_nowait(batch)
        except queue.Full:
            raise Busy from None
        self._ensure_threads()
        return batch.done

    def _ensure_threads(self) -> None:
        with self._lock:
            self._running = [t for t in self._running if t.is_alive()]
            while len(self._running) < self.threads:
                thread = threading.Thread(
                    target=self._run, name="belated-group-writer", daemon=True
                )
                thread.start()
                self._running.append(thread)

    def _run(self) -> None:
        while True:
            try:
                first = self.queue.get(timeout=IDLE_SECONDS)
            except queue.Empty:
                with self._lock:  # idle: leave, unless a batch slipped in meanwhile
                    if self.queue.empty():
                        self._running.remove(threading.current_thread())
                        return
                continue
            group, rows = [first], len(first.items)
            while rows < MAX_GROUP_ROWS:
                try:
                    more = self.queue.get_nowait()
                except queue.Empty:
                    break
                group.append(more)
                rows += len(more.items)
            self._store(group)

    def _store(self, group: list[Batch]) -> None:
        preds = [b for b in group if b.kind == "predictions"]
        marks = [b for b in group if b.kind == "labels"]
        try:
            with transaction(self.sessions) as session:
                touched: dict[int, set[int]] = {}
                store = _store_pg if is_postgres(session) else _store_sqlite
                answers = store(session, preds, touched) + _store_labels(session, marks, touched)
                # the hours are held last (store/dirty.py): after every row lock this
                # transaction takes, in one ascending pass, and committed with them
                dirty.hold_and_commit(session, touched)
        except Exception:  # each batch alone, for an answer of its own
            log.debug("a group of %d batches is stored batch by batch", len(group), exc_info=True)
            for batch in group:
                _settle(batch, partial(self._alone, batch))
            return
        for batch, answer in zip(preds + marks, answers, strict=True):
            batch.done.set_result(answer)

    def _alone(self, batch: Batch) -> dict[str, int]:
        with transaction(self.sessions) as session:
            if batch.kind == "labels":
                return labels.ingest(
                    session=session, model_id=batch.model_id, items=batch.items, now=batch.received
                )
            return predictions.ingest(
                session=session,
                model_id=batch.model_id,
                preds=batch.items,
                batch_size=batch.batch_size,
                now=batch.received,
            )


def _settle(batch: Batch, work: Callable[[], dict[str, int]]) -> None:
    try:
        batch.done.set_result(work())
    except BaseException as exc:  # the request's answer: a 409, a 503, ...
        batch.done.set_exception(exc)


class _Regroup(Exception):
    """The group cannot be stored as one: store its batches one by one."""


def _store_labels(
    session: Session, group: list[Batch], touched: dict[int, set[int]]
) -> list[dict[str, int]]:
    """Each model's label batches applied in arrival order, as one; answers per batch."""
    answers: dict[int, dict[str, int]] = {}
    for model_id in sorted({b.model_id for b in group}):
        mine = [b for b in group if b.model_id == model_id]
        got, hours = labels.ingest_batches(
            session=session,
            model_id=model_id,
            batches=[(b.items, b.received) for b in mine],
            lock=None,
        )
        touched.setdefault(model_id, set()).update(hours)
        answers.update({id(b): a for b, a in zip(mine, got, strict=True)})
    return [answers[id(b)] for b in group]


def _store_sqlite(
    session: Session, group: list[Batch], touched: dict[int, set[int]]
) -> list[dict[str, int]]:
    """The whole group in a few statements (SQLite has one writer, BEGIN IMMEDIATE, so the
    look-up of stored ids is authoritative); answers per batch, or _Regroup."""
    # one too old for its model's raw days: batch by batch, so only its request is 422
    raw_retention.refuse_each(session, [(b.model_id, b.items) for b in group])
    first, owner = _first_of_each(group)
    by_model: dict[int, list[str]] = {}
    for m, pid in first:
        by_model.setdefault(m, []).append(pid)
    new: list[tuple[int, str]] = []
    for m, ids in sorted(by_model.items()):
        stored = predictions.existing(session=session, model_id=m, ids=ids)
        for pid in ids:
            if pid not in stored:
                new.append((m, pid))
            elif not first[(m, pid)].same_as(stored[pid]):
                raise _Regroup
    if new:
        predictions.insert_sqlite(
            session, ((k[0], first[k], group[owner[k]].received) for k in new)
        )
    mine: dict[int, set[int]] = {}
    for m, pid in new:
        mine.setdefault(m, set()).add(predictions.epoch_hour(first[(m, pid)].ts))
    for m in sorted(mine):
        ids = [pid for mm, pid in new if mm == m]
        hours = mine[m]
        if labels.any_pending(session=session, model_id=m, ids=ids):
            hours |= labels.join_pending(session=session, model_id=m, ids=ids)
        dirty.mark(session=session, model_id=m, hours=hours, lock=None)
        touched.setdefault(m, set()).update(hours)
    return _answers(group, owner, set(new))


def _first_of_each(
    group: list[Batch],
) -> tuple[dict[tuple[int, str], PredictionIn], dict[tuple[int, str], int]]:
    """The first item of each (model, id) in the group and the batch it is in; _Regroup when
    a later batch sends one of them with other content."""
    first: dict[tuple[int, str], PredictionIn] = {}
    owner: dict[tuple[int, str], int] = {}
    for i, batch in enumerate(group):
        for p in batch.items:
            key = (batch.model_id, p.pid)
            if key not in first:
                first[key], owner[key] = p, i
            elif not p.same_as(first[key]):
                raise _Regroup
    return first, owner


def _answers(
    group: list[Batch], owner: dict[tuple[int, str], int], inserted: set[tuple[int, str]]
) -> list[dict[str, int]]:
    accepted = [0] * len(group)
    for key in inserted:
        accepted[owner[key]] += 1
    return [
        {"accepted": n, "duplicates": batch.batch_size - n}
        for n, batch in zip(accepted, group, strict=True)
    ]


# One statement for the whole group. A row of an hour below its model's raw_from_hour (its
# day's raw rows were dropped by retention) is stored nowhere and reported by a row of
# NULLs: the group is then stored batch by batch, and that batch answered 422
# (store/raw_retention.py), as `refuse_each` does on SQLite, without a round trip of its own.
_GROUP_SQL = """
WITH src AS MATERIALIZED (
  SELECT * FROM unnest(%(m)b::int4[], %(pid)b::text[], %(ts)b::timestamptz[], %(hour)b::int4[],
    %(score)b::float8[], %(scores)b::text[], %(predicted)b::text[], %(tags)b::text[],
    %(at)b::timestamptz[])
    AS r(m, pid, ts, hour, score, scores, predicted, tags, at)
), too_old AS MATERIALIZED (
  SELECT src.m, src.pid FROM src JOIN models x ON x.id = src.m WHERE src.hour < x.raw_from_hour
), reg AS (
  INSERT INTO prediction_ids (model_id, pid, hour)
  SELECT m, pid, hour FROM src
  WHERE NOT EXISTS (SELECT 1 FROM too_old o WHERE o.m = src.m AND o.pid = src.pid)
  ON CONFLICT (model_id, pid) DO NOTHING
  RETURNING model_id, pid
), ins AS (
  INSERT INTO predictions (model_id, pid, ts, hour, score, scores, predicted, tags, received_at)
  SELECT r.m, r.pid, r.ts, r.hour, r.score, r.scores::jsonb, r.predicted, r.tags::jsonb, r.at
  FROM src r JOIN reg ON reg.model_id = r.m AND reg.pid = r.pid
  RETURNING model_id, pid, hour
), marks AS (
  INSERT INTO dirty_buckets (model_id, hour, marked_at, recompute)
  SELECT DISTINCT model_id, hour, %(marked)b, true FROM ins
)
SELECT ins.model_id, ins.pid, ins.hour, EXISTS (
  SELECT 1 FROM pending_labels w WHERE w.model_id = ins.model_id AND w.pid = ins.pid
) FROM ins
UNION ALL
SELECT NULL, NULL, NULL, NULL WHERE EXISTS (SELECT 1 FROM too_old)
"""


def _store_pg(
    session: Session, group: list[Batch], touched: dict[int, set[int]]
) -> list[dict[str, int]]:
    """The whole group in one statement; answers per batch, or _Regroup."""
    if not group:
        return []
    first, owner = _first_of_each(group)
    keys = list(first)
    rows = [first[k] for k in keys]
    received = [group[owner[k]].received for k in keys]
    partitions.ensure_hours(session, {predictions.epoch_hour(p.ts) for p in rows})
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        stored = bulk.execute_opening(
            cur,
            _GROUP_SQL,
            {
                "m": [k[0] for k in keys],
                "pid": [k[1] for k in keys],
                "ts": [p.ts for p in rows],
                "hour": [predictions.epoch_hour(p.ts) for p in rows],
                "score": [p.score for p in rows],
                "scores": [bulk.json_text(p.scores) for p in rows],
                "predicted": [p.predicted for p in rows],
                "tags": [bulk.json_text(p.tags) for p in rows],
                "at": received,
                "marked": max(received),
            },
        ).fetchall()
        if any(m is None for m, _, _, _ in stored):
            raise _Regroup  # a row below its model's retained raw days: see _GROUP_SQL
        inserted = {(int(m), pid) for m, pid, _, _ in stored}
        rest = [k for k in keys if k not in inserted]
        if rest:  # stored before this group: the same content, or a conflict
            for model in sorted({k[0] for k in rest}):
                ids = [k[1] for k in rest if k[0] == model]
                old = predictions.existing(session=session, model_id=model, ids=ids)
                if any(not first[(model, pid)].same_as(p) for pid, p in old.items()):
                    raise _Regroup
    waiting: dict[int, list[str]] = {}
    for m, pid, hour, pending in stored:
        touched.setdefault(int(m), set()).add(int(hour))
        if pending:
            waiting.setdefault(int(m), []).append(pid)
    for model_id in sorted(waiting):
        hours = labels.join_pending(session=session, model_id=model_id, ids=waiting[model_id])
        dirty.mark(session=session, model_id=model_id, hours=hours, recompute=False, lock=None)
        touched[model_id] |= hours
    return _answers(group, owner, inserted)
