"""Daily time partitions of the raw predictions on PostgreSQL, and the id registry.

    predictions (PARTITION BY RANGE (hour))
      ├─ predictions_p20261203   hours [d·24, d·24 + 24) of one UTC day
      ├─ ...                     created ahead by the jobs, on demand for a late day
      └─ predictions_default     anything whose day has no partition yet
    prediction_ids (model_id, pid) → hour     uniqueness across partitions

PostgreSQL keeps a unique index only within a partition unless it includes the partition
key, and (model, id, hour) would let an id re-sent with another time be stored twice. The
registry holds one row per stored prediction, keyed by (model, id): every insert goes
through it first (ON CONFLICT DO NOTHING), and every look-up by id reads the hour there and
then probes that one partition. SQLite keeps its single table with UNIQUE (model, id).

A day's partition is created before its first rows where possible (`ensure_hours`, best
effort and cached: it runs on a connection of its own with a short lock timeout). When that
could not happen the rows land in the default partition, and the jobs' `maintain` moves
them into a partition of their own; nothing is refused for want of a partition.
"""

from __future__ import annotations

import logging
import re
import threading
import time
from collections.abc import Callable, Iterable
from datetime import UTC, datetime, timedelta

from sqlalchemy import Connection, Engine, text
from sqlalchemy.orm import Session

log = logging.getLogger(__name__)

PARENT = "predictions"
DEFAULT = "predictions_default"
# a fifth of each page left free: a label's update of its prediction then stays on the page
# (a heap-only tuple) and touches none of the partition's four indexes (common practice for
# rows updated once after insert; migrations/versions/20261203_0020_fillfactor.py)
FILLFACTOR = 80
REGISTRY = "prediction_ids"
AHEAD_DAYS = 7  # the jobs keep partitions this many days ahead of today
_NAME = re.compile(r"^predictions_(p\d{8}|default)$")
_LOCK = 0x6265_6C61_7465_6470  # advisory key serialising partition changes
LOCK_TIMEOUT = "2s"

_known: dict[str, set[int]] = {}  # engine url → days given a partition, or tried
_known_guard = threading.Lock()
# engine url → (monotonic time read, days seen in the catalogue with a partition of their own)
_seen: dict[str, tuple[float, set[int]]] = {}
SEEN_SECONDS = 30.0  # how long a reading of the catalogue serves `have_partitions`


def is_partition(name: str) -> bool:
    """Whether a table name is one of the predictions' partitions (not a table of the code)."""
    return bool(_NAME.match(name))


def day_name(day: int) -> str:
    """The partition of a UTC day counted from the Unix epoch."""
    return f"predictions_p{(datetime(1970, 1, 1, tzinfo=UTC) + timedelta(days=day)):%Y%m%d}"


def _key(engine: Engine) -> str:
    return engine.url.render_as_string(hide_password=True)


def existing_days(conn: Connection) -> set[int]:
    """The days that have a partition of their own."""
    days = set()
    for (name,) in conn.execute(
        text(
            "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid"
            " WHERE i.inhparent = 'predictions'::regclass"
        )
    ):
        if name.startswith("predictions_p"):
            stamp = datetime.strptime(name[len("predictions_p") :], "%Y%m%d").replace(tzinfo=UTC)
            days.add(int(stamp.timestamp()) // 86400)
    return days


def create_day(conn: Connection, day: int) -> bool:
    """Give `day` a partition of its own, moving its rows out of the default partition;
    False when it had one. Runs in the caller's transaction (hold the advisory lock)."""
    name = day_name(day)
    if conn.execute(text("SELECT to_regclass(:n)"), {"n": name}).scalar() is not None:
        return False
    lo, hi = day * 24, day * 24 + 24
    conn.execute(
        text(
            f"CREATE TABLE {name} (LIKE {PARENT} INCLUDING DEFAULTS)"
            f" WITH (fillfactor = {FILLFACTOR})"
        )
    )
    # rows routed to the default partition before this day had a partition: move them
    conn.execute(
        text(
            f"WITH moved AS (DELETE FROM {DEFAULT} WHERE hour >= :lo AND hour < :hi"
            f" RETURNING *) INSERT INTO {name} SELECT * FROM moved"
        ),
        {"lo": lo, "hi": hi},
    )
    conn.execute(
        text(f"ALTER TABLE {PARENT} ATTACH PARTITION {name} FOR VALUES FROM ({lo}) TO ({hi})")
    )
    return True


def create_days(conn: Connection, days: Iterable[int]) -> int:
    """Create the missing partitions of `days` under the advisory lock; how many were new."""
    conn.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": _LOCK})
    have = existing_days(conn)
    return sum(create_day(conn, d) for d in sorted(set(days) - have))


def ensure_hours(session: Session, hours: Iterable[int]) -> None:
    """Best effort, before a write: give the days of `hours` partitions of their own.

    Cached per process, so a write to known days costs nothing. Done on a connection of its
    own when the session is bound to an engine (never waiting on the caller's transaction),
    in a savepoint when it is bound to one connection; a failure (a lock not granted in
    time) is logged, and the rows go to the default partition, which the jobs empty later."""
    bind = session.get_bind()
    if bind.dialect.name != "postgresql":
        return
    engine = bind if isinstance(bind, Engine) else bind.engine
    key = _key(engine)
    days = {h // 24 for h in hours}
    with _known_guard:
        missing = days - _known.get(key, set())
    if not missing:
        return
    try:
        if isinstance(bind, Engine):
            with bind.connect() as conn:
                conn.execute(text(f"SET LOCAL lock_timeout = '{LOCK_TIMEOUT}'"))
                create_days(conn, missing)
                have = existing_days(conn)
                conn.commit()
        else:
            with session.begin_nested():
                conn = session.connection()
                create_days(conn, missing)
                have = existing_days(conn)
    except Exception as exc:  # the rows still land, in the default partition
        log.warning("partitions for days %s not created now: %s", sorted(missing), exc)
        have = missing  # do not try again in this process: the jobs will
    with _known_guard:
        _known.setdefault(key, set()).update(have)


def forget(engine: Engine) -> None:
    """Drop the caches of known partitions (after a partition is dropped)."""
    with _known_guard:
        _known.pop(_key(engine), None)
        _seen.pop(_key(engine), None)


def have_partitions(session: Session, days: set[int]) -> set[int]:
    """Those of `days` that have a partition of their own, for statements that name them.

    The catalogue is read only when a day is not among those it showed in the last
    SEEN_SECONDS: reading it for every small labels batch cost a sixth of the writer's time
    and a round trip twice a batch (bench/live.py). A day seen with a partition keeps it
    until retention drops the day, and the drop deletes the registry rows that would lead a
    statement there (store/partition_retention.py); another process's drop is seen here
    within SEEN_SECONDS. A day without a partition is never cached: its rows are in the
    default partition only until the jobs or a writer give it one."""
    bind = session.get_bind()
    key = _key(bind if isinstance(bind, Engine) else bind.engine)
    stamp = time.monotonic()
    with _known_guard:
        read_at, seen = _seen.get(key, (0.0, set()))
    if days <= seen and stamp - read_at < SEEN_SECONDS:
        return set(days)
    have = existing_days(session.connection())
    with _known_guard:
        _seen[key] = (stamp, have)
    return days & have


def maintain(session: Session, now: datetime) -> dict[str, int]:
    """The jobs' step: partitions for today and AHEAD_DAYS ahead, and a partition for every
    day that has rows in the default partition."""
    conn = session.connection()
    if conn.dialect.name != "postgresql":
        return {"created": 0}
    today = int(now.timestamp()) // 86400
    stray = {int(h) // 24 for (h,) in conn.execute(text(f"SELECT DISTINCT hour FROM {DEFAULT}"))}
    conn.execute(text(f"SET LOCAL lock_timeout = '{LOCK_TIMEOUT}'"))
    created = create_days(conn, set(range(today, today + AHEAD_DAYS + 1)) | stray)
    return {"created": created, "moved_days": len(stray)}


IncludeHook = Callable[[object, str | None, str, bool, object], bool]


def include_object(dialect: str) -> IncludeHook:
    """An Alembic `include_object` hook: what the code's tables and the store may differ in
    by design (the partitions and their indexes on PostgreSQL; the registry, which SQLite
    does without)."""

    def include(
        _obj: object, name: str | None, type_: str, _reflected: bool, _compare_to: object
    ) -> bool:
        if type_ == "table" and name is not None:
            if is_partition(name):
                return False
            if name == REGISTRY and dialect == "sqlite":
                return False
        if dialect == "postgresql" and name in _PG_ONLY_OR_NOT:
            return False
        return True

    return include


# the per-table uniqueness of (model, id) is the registry's on PostgreSQL; the partitioned
# table has a unique index of (model, id, hour) instead
_PG_ONLY_OR_NOT = {"uq_predictions_model_pid", "uq_predictions_model_pid_hour"}


# One probe of the registry's key per id, whatever the statistics say (store/by_day.py).
REGISTRY_PROBE = (
    f"(SELECT r.hour FROM {REGISTRY} r WHERE r.model_id = %(m)s AND r.pid = k.pid OFFSET 0)"
)
_HOURS_SQL = f"""
SELECT DISTINCT r.hour FROM unnest(%(ids)b::text[]) AS k(pid)
CROSS JOIN LATERAL {REGISTRY_PROBE} r
"""


def hours_of(session: Session, model_id: int, ids: list[str]) -> list[int]:
    """The hours of the stored predictions among `ids`, from the registry (PostgreSQL).

    A query on `predictions` that names its hours as a parameter is planned over the day
    partitions of those hours only: without them, planning alone visits every partition
    (about 0.7 ms each on this machine, 250 ms for a year)."""
    raw = session.connection().connection.driver_connection
    assert raw is not None
    with raw.cursor() as cur:
        rows = cur.execute(_HOURS_SQL, {"ids": ids, "m": model_id}, prepare=True).fetchall()
    return sorted(int(r[0]) for r in rows)


def hours_clause(hours: Iterable[int], column: str = "p.hour") -> str:
    """SQL naming the whole days of `hours` as ranges of `column` (runs of days merged), for
    the planner to prune every other partition; FALSE when there are none.

    Ranges, not `column = ANY(hours)`: the planner estimates an ANY list element by element
    for every partition (680 ms of planning for 1,000 hours over 137 partitions, measured),
    and a run of days costs one pair of comparisons."""
    days = sorted({int(h) // 24 for h in hours})
    if not days:
        return "FALSE"
    runs: list[list[int]] = []
    for day in days:
        if runs and runs[-1][1] == day:
            runs[-1][1] = day + 1
        else:
            runs.append([day, day + 1])
    return (
        "(" + " OR ".join(f"({column} >= {a * 24} AND {column} < {b * 24})" for a, b in runs) + ")"
    )
