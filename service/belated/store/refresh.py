"""The refresh: recompute dirty buckets, taking exactly the marks that were there to take.

One transaction per batch of buckets: a crash mid-run loses nothing (the marks are still
there) and the next run repeats the work. On PostgreSQL a refresh holds the hours it works
on exclusively (store/dirty.py): writers of those hours wait for it, and a second refresh
of an hour (the job and a read-your-writes read) runs after the first, then finds the marks
already taken.
"""

from __future__ import annotations

import logging
from collections import defaultdict
from datetime import timedelta
from itertools import groupby
from typing import Any, NamedTuple

from sqlalchemy import delete, select, tuple_
from sqlalchemy.orm import Session, sessionmaker

from belated.clock import now
from belated.store import dirty, labels, raw_retention, rollups
from belated.store.db import transaction
from belated.store.tables import DirtyBucket, ModelRow, PendingLabel, Prediction, ServiceState

log = logging.getLogger(__name__)
BATCH_HOURS = 168


class Mark(NamedTuple):
    """A dirty (model, hour) taken by a refresh, and whether any of its marks asked for a
    recompute from raw rows."""

    model_id: int
    hour: int
    recompute: bool


def _claim(session: Session, model_id: int | None, lo: int | None, hi: int | None) -> list[Mark]:
    query = select(DirtyBucket.model_id, DirtyBucket.hour).distinct()
    if model_id is not None:
        query = query.where(DirtyBucket.model_id == model_id)
    if lo is not None:
        query = query.where(DirtyBucket.hour >= lo)
    if hi is not None:
        query = query.where(DirtyBucket.hour < hi)
    query = query.order_by(DirtyBucket.model_id, DirtyBucket.hour).limit(BATCH_HOURS)
    while chosen := [(int(m), int(h)) for m, h in session.execute(query)]:
        if taken := _take(session, chosen):
            return taken
    return []


def _take(session: Session, chosen: list[tuple[int, int]]) -> list[Mark]:
    for mid, group in groupby(chosen, key=lambda mh: mh[0]):
        dirty.lock_hours(session, mid, [h for _, h in group], "exclusive")
    # every mark of the chosen hours, those committed while this waited for the locks too;
    # an hour another refresh took meanwhile has none left and is skipped
    taken: dict[tuple[int, int], bool] = {}
    for i in range(0, len(chosen), 500):
        for mid, hour, recompute in session.execute(
            delete(DirtyBucket)
            .where(tuple_(DirtyBucket.model_id, DirtyBucket.hour).in_(chosen[i : i + 500]))
            .returning(DirtyBucket.model_id, DirtyBucket.hour, DirtyBucket.recompute)
        ):
            key = (int(mid), int(hour))
            taken[key] = taken.get(key, False) or bool(recompute)
    return [Mark(m, h, r) for (m, h), r in sorted(taken.items())]


def refresh_batch(
    session: Session,
    *,
    max_values: int,
    model_id: int | None = None,
    lo: int | None = None,
    hi: int | None = None,
) -> list[Mark]:
    """Refresh one batch of dirty buckets in the caller's transaction; return the marks
    taken (none when no work is left)."""
    claimed = _claim(session, model_id, lo, hi)
    if not claimed:
        return []
    recompute: dict[int, list[int]] = defaultdict(list)
    fold: dict[int, list[int]] = defaultdict(list)
    for mark in claimed:
        (recompute if mark.recompute else fold)[mark.model_id].append(mark.hour)
    stamp = now()
    for mid in sorted(set(recompute) | set(fold)):
        model = session.get(ModelRow, mid)
        # a lake-fed model has no raw rows: its rollups are uploaded, never recomputed
        if model is not None and model.source != "lake":
            rollups.refresh_hours(
                session=session,
                model=model,
                recompute=raw_retention.retained_hours(session, model, recompute[mid]),
                now=stamp,
                max_values=max_values,
                fold=raw_retention.retained_hours(session, model, fold[mid]),
            )
    return claimed


def refresh_model_hours(
    session: Session, *, model: ModelRow, hours: list[int], max_values: int
) -> list[Mark]:
    """Hold these hours of a model exclusively until the end of the caller's transaction
    and bring them up to date (every mark of theirs taken): an erasure's first step."""
    taken = _take(session, [(model.id, h) for h in sorted(set(hours))])  # locks them all
    if not taken:
        return []
    rollups.refresh_hours(
        session=session,
        model=model,
        recompute=raw_retention.retained_hours(
            session, model, [m.hour for m in taken if m.recompute]
        ),
        now=now(),
        max_values=max_values,
        fold=raw_retention.retained_hours(
            session, model, [m.hour for m in taken if not m.recompute]
        ),
    )
    return taken


def refresh_all(
    factory: sessionmaker[Session],
    *,
    max_values: int,
    model_id: int | None = None,
    lo: int | None = None,
    hi: int | None = None,
) -> int:
    """Refresh dirty buckets batch by batch, each in its own transaction."""
    total = 0
    while True:
        with transaction(factory) as session:
            done = len(
                refresh_batch(session, max_values=max_values, model_id=model_id, lo=lo, hi=hi)
            )
        if not done:
            return total
        total += done


def join_and_mark(factory: sessionmaker[Session]) -> int:
    """Before a refresh: join pending labels whose prediction has arrived since (a label and
    its prediction written in concurrent transactions), and mark the hours whose predictions
    have just crossed `negative_after_days`."""
    marked = 0
    with transaction(factory) as session:
        pending_models = session.scalars(select(PendingLabel.model_id).distinct()).all()
        for mid in pending_models:
            hours = labels.join_pending(session=session, model_id=mid, ids=None)
            marked += dirty.mark(
                session=session, model_id=mid, hours=hours, recompute=False, lock="exclusive"
            )
    with transaction(factory) as session:
        for model in session.scalars(
            select(ModelRow).where(ModelRow.negative_after_days.is_not(None))
        ).all():
            marked += _mark_newly_implied(session, model)
    return marked


def join_and_mark_model(session: Session, model: ModelRow) -> int:
    """`join_and_mark` for one model in the caller's transaction (a read that must be
    current)."""
    hours = labels.join_pending(session=session, model_id=model.id, ids=None)
    marked = dirty.mark(
        session=session, model_id=model.id, hours=hours, recompute=False, lock="exclusive"
    )
    if model.negative_after_days is not None:
        marked += _mark_newly_implied(session, model)
    return marked


def _mark_newly_implied(session: Session, model: ModelRow) -> int:
    assert model.negative_after_days is not None
    stamp = now()
    cut = stamp - timedelta(days=model.negative_after_days)
    cut_hour = int(cut.timestamp() // 3600)
    key = f"implied_cut:{model.id}"
    state = session.get(ServiceState, key)
    last = int(state.value) if state is not None else None
    query = (
        select(Prediction.hour)
        .distinct()
        .where(
            Prediction.model_id == model.id,
            Prediction.actual.is_(None),
            Prediction.hour <= cut_hour,
        )
    )
    if last is not None:
        query = query.where(Prediction.hour >= last)
    hours = list(session.scalars(query))
    n = dirty.mark(session=session, model_id=model.id, hours=hours, lock="exclusive")
    if state is None:
        session.add(ServiceState(key=key, value=cut_hour, updated_at=stamp))
    else:
        state.value, state.updated_at = cut_hour, stamp
    return n


def record_run(factory: sessionmaker[Session], summary: dict[str, Any]) -> None:
    """Leave the last refresh's time and figures for /healthz and /metrics."""
    with transaction(factory) as session:
        state = session.get(ServiceState, "last_refresh")
        value = {"at": now().isoformat().replace("+00:00", "Z"), **summary}
        if state is None:
            session.add(ServiceState(key="last_refresh", value=value, updated_at=now()))
        else:
            state.value, state.updated_at = value, now()


def mark_model(session: Session, model_id: int) -> int:
    """Mark every retained hour of a model dirty (a rebuild, or a setting that changes
    rollups); hours below raw_from_hour have no raw rows left to aggregate."""
    query = select(Prediction.hour).distinct().where(Prediction.model_id == model_id)
    first = session.scalar(select(ModelRow.raw_from_hour).where(ModelRow.id == model_id))
    if first is not None:
        query = query.where(Prediction.hour >= first)
    hours = list(session.scalars(query))
    return dirty.mark(session=session, model_id=model_id, hours=hours, lock="exclusive")


def rebuild(factory: sessionmaker[Session], *, max_values: int, model_id: int | None = None) -> int:
    """Recompute every rollup (of one model, or all) from raw rows; the rollups of days
    whose raw rows retention dropped are kept as they are."""
    from belated.store.rollup_tables import Rollup

    with transaction(factory) as session:
        # a lake-fed model's rollups are uploaded: with no raw rows, a rebuild would lose them
        http = select(ModelRow).where(ModelRow.source != "lake")
        if model_id is not None:
            http = http.where(ModelRow.id == model_id)
        ids: list[int] = []
        for model in session.scalars(http).all():
            gone = delete(Rollup).where(Rollup.model_id == model.id)
            if model.raw_from_hour is not None:  # a UTC midnight: hourly and daily rows alike
                gone = gone.where(Rollup.start >= model.raw_from_hour)
            session.execute(gone)
            mark_model(session, model.id)
            ids.append(model.id)
    total = 0
    for mid in ids:
        total += refresh_all(factory, max_values=max_values, model_id=mid)
    return total
