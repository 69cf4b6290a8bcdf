"""Alert numbers: one sequence per project, taken in the transaction that opens the alert.

The number pages the alert list (`seq < after`), so it must be unique in its project and
never given out twice, also after the alert that carried it was deleted with its rule. One
row per project holds the last number; an upsert with RETURNING bumps and reads it in one
statement. On PostgreSQL the statement locks the row until the transaction ends, so
concurrent evaluations of one project wait for each other there (each rule is evaluated in a
transaction of its own, so no transaction waits for two projects); SQLite runs one writer
at a time (every transaction begins IMMEDIATE). A number taken by a transaction that rolls
back is given out again, which is harmless: no alert kept it.
"""

from __future__ import annotations

from sqlalchemy import func, select
from sqlalchemy.dialects import postgresql, sqlite
from sqlalchemy.orm import Session

from belated.alerts.tables import Alert, AlertSequence


def next_seq(*, session: Session, project_id: int) -> int:
    """The next alert number of the project, reserved until the transaction ends."""
    table = AlertSequence.__table__
    dialect = postgresql if session.get_bind().dialect.name == "postgresql" else sqlite
    # a project without a counter row yet (alerts from before the counter) starts past them
    first = (
        select(func.coalesce(func.max(Alert.seq), 0) + 1)
        .where(Alert.project_id == project_id)
        .scalar_subquery()
    )
    stmt = dialect.insert(table).values(project_id=project_id, last_seq=first)
    stmt = stmt.on_conflict_do_update(
        index_elements=[table.c.project_id], set_={"last_seq": table.c.last_seq + 1}
    ).returning(table.c.last_seq)
    return int(session.execute(stmt).scalar_one())
