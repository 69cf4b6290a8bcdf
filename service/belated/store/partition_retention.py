"""Retention on PostgreSQL's day partitions: a model's raw days removed, a day partition
dropped whole when no other model has rows in it (store/partitions.py has the layout)."""

from __future__ import annotations

import logging

from sqlalchemy import Engine, text
from sqlalchemy.orm import Session

from belated.store.partitions import LOCK_TIMEOUT, PARENT, REGISTRY, day_name, existing_days, forget

log = logging.getLogger(__name__)


def drop_model_hours(session: Session, model_id: int, lo_hour: int, hi_hour: int) -> int:
    """Retention on PostgreSQL: remove a model's raw predictions of hours [lo, hi) (whole
    days; their label history and registry rows first); the number removed.

    A day partition that holds no other model's rows is dropped whole (a catalogue change,
    whatever its size, and its disk returned at once); otherwise the model's rows are
    deleted from it. A drop that cannot take its lock in time falls back to the delete."""
    conn = session.connection()
    rows = f"model_id = :m AND hour >= {int(lo_hour)} AND hour < {int(hi_hour)}"
    params = {"m": model_id}
    conn.execute(
        text(
            "DELETE FROM labels WHERE model_id = :m AND pid IN"
            f" (SELECT pid FROM {PARENT} WHERE {rows})"
        ),
        params,
    )
    conn.execute(
        text(
            f"DELETE FROM {REGISTRY} r USING {PARENT} p WHERE r.model_id = :m"
            f" AND r.pid = p.pid AND p.model_id = :m AND p.hour >= {int(lo_hour)}"
            f" AND p.hour < {int(hi_hour)}"
        ),
        params,
    )
    removed = 0
    dropped_any = False
    have = existing_days(conn)
    for day in range(int(lo_hour) // 24, (int(hi_hour) + 23) // 24):
        lo, hi = max(day * 24, int(lo_hour)), min(day * 24 + 24, int(hi_hour))
        whole = lo == day * 24 and hi == day * 24 + 24 and day in have
        gone = _drop_if_alone(session, day, model_id) if whole else None
        if gone is not None:
            removed += gone
            dropped_any = True
            continue
        result = conn.execute(
            text(f"DELETE FROM {PARENT} WHERE model_id = :m AND hour >= {lo} AND hour < {hi}"),
            params,
        )
        removed += int(getattr(result, "rowcount", 0) or 0)
    if dropped_any:
        bind = session.get_bind()
        forget(bind if isinstance(bind, Engine) else bind.engine)
    return removed


class _Shared(Exception):
    """The day's partition holds another model's rows: it is not dropped."""


def _drop_if_alone(session: Session, day: int, model_id: int) -> int | None:
    """Drop the day's partition if only this model has rows in it; the rows it held, or
    None when it was kept (shared, or its lock not granted in time: the caller deletes).

    The parent is locked before the partition, in the order writers take them, and before
    the check, so that no other model's row can arrive between the check and the drop."""
    conn = session.connection()
    name = day_name(day)
    try:
        with session.begin_nested():
            conn.execute(text(f"SET LOCAL lock_timeout = '{LOCK_TIMEOUT}'"))
            conn.execute(text(f"LOCK TABLE {PARENT}, {name} IN ACCESS EXCLUSIVE MODE"))
            other = text(f"SELECT 1 FROM {name} WHERE model_id <> :m LIMIT 1")
            if conn.execute(other, {"m": model_id}).first() is not None:
                raise _Shared
            n = int(conn.execute(text(f"SELECT count(*) FROM {name}")).scalar() or 0)
            conn.execute(text(f"DROP TABLE {name}"))
        return n
    except _Shared:
        return None
    except Exception as exc:  # busy: the caller's delete does the same, more slowly
        log.warning("partition %s not dropped now (%s); its rows are deleted", name, exc)
        return None
