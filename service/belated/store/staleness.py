"""How stale a read-only replica's answers are: what the primary's jobs leave, what the
standby replays.

The primary's refresh step records when its last complete run began (`refreshed_through`):
every write acknowledged before that moment is in the rollups it left. A replica reads that
record from its own copy of the store, so its answers reflect every write acknowledged up to
then, and `now - refreshed_through` bounds their staleness. On a streaming standby the
record arrives by replay; the replay lag is part of that figure already (the record is at
least as old as the last transaction replayed), and is reported beside it for operators.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import Connection, select, text
from sqlalchemy.orm import Session, sessionmaker

from belated.store.db import is_sqlite, transaction
from belated.store.tables import ServiceState
from belated.timeutil import from_db, iso

KEY = "refreshed_through"


def record_refreshed(factory: sessionmaker[Session], *, started: datetime) -> None:
    """Leave the start of a complete refresh: every write acknowledged before it is in the
    rollups (written by the jobs of the primary)."""
    with transaction(factory) as session:
        state = session.get(ServiceState, KEY)
        value = {"at": iso(started)}
        # the last to finish wins, even if it began earlier: the figure errs on the old side
        if state is None:
            session.add(ServiceState(key=KEY, value=value, updated_at=started))
        else:
            state.value, state.updated_at = value, started


def refreshed_through(*, conn: Connection) -> datetime | None:
    """The start of the primary's last complete refresh as this store holds it, or None."""
    value = conn.execute(select(ServiceState.value).where(ServiceState.key == KEY)).scalar()
    return from_db(value.get("at")) if isinstance(value, dict) else None


def replay(*, conn: Connection) -> tuple[bool, float | None]:
    """Whether the store is a standby in recovery, and the seconds since the last
    transaction it replayed (None off a standby).

    The replay figure grows while the primary is idle though nothing is missing, so it is
    reported, not used as the staleness."""
    if is_sqlite(conn.engine):
        return False, None
    row = conn.execute(
        text(
            "SELECT pg_is_in_recovery(),"
            " extract(epoch FROM now() - pg_last_xact_replay_timestamp())"
        )
    ).one()
    in_recovery = bool(row[0])
    lag = float(row[1]) if in_recovery and row[1] is not None else None
    return in_recovery, lag


def read(*, conn: Connection) -> dict[str, Any]:
    """What the replica knows of its own freshness (see the module docstring)."""
    in_recovery, lag = replay(conn=conn)
    return {
        "refreshed_through": refreshed_through(conn=conn),
        "in_recovery": in_recovery,
        "replay_lag_seconds": None if lag is None else round(max(lag, 0.0), 3),
    }


def seconds(refreshed: datetime | None, now: datetime) -> float | None:
    """Staleness in seconds as of `now`; None when no refresh has completed yet."""
    if refreshed is None:
        return None
    return round(max((now - refreshed).total_seconds(), 0.0), 3)
