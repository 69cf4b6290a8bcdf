"""Dirty (model, hour) marks: every write marks the hours it touched, with a fresh version.

The version is a random 62-bit number rather than a counter, so that a mark cleared and made
again is never mistaken for the one a refresh read earlier.
"""

from __future__ import annotations

import secrets
from collections.abc import Iterable
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from belated.clock import now
from belated.store.dialect import upsert
from belated.store.tables import DirtyBucket


def _insert(session: Session) -> Any:
    return upsert(session, DirtyBucket)


def mark(*, session: Session, model_id: int, hours: Iterable[int], recompute: bool = True) -> int:
    """Mark the hours dirty (in sorted order, so concurrent writers lock alike).

    `recompute=False` says only labels changed (their changes are in `label_changes`); a
    mark that already asks for a recompute keeps asking.
    """
    ordered = sorted(set(hours))
    if not ordered:
        return 0
    stamp = now()
    rows = [
        {
            "model_id": model_id,
            "hour": h,
            "version": secrets.randbits(62),
            "marked_at": stamp,
            "recompute": recompute,
        }
        for h in ordered
    ]
    stmt = _insert(session)
    stmt = stmt.on_conflict_do_update(
        index_elements=["model_id", "hour"],
        set_={
            "version": stmt.excluded.version,
            "marked_at": stmt.excluded.marked_at,
            "recompute": DirtyBucket.__table__.c.recompute | stmt.excluded.recompute,
        },
    )
    for start in range(0, len(rows), 2000):
        session.execute(stmt, rows[start : start + 2000])
    return len(ordered)


def count(*, session: Session, model_id: int | None = None) -> int:
    """How many buckets are dirty."""
    query = select(func.count()).select_from(DirtyBucket)
    if model_id is not None:
        query = query.where(DirtyBucket.model_id == model_id)
    return int(session.scalar(query) or 0)
