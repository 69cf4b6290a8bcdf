"""PostgreSQL: day partitions of predictions leave a fifth of each page free

A label sets three columns of a stored prediction. On a full page the new row version goes
to another page and every index of the partition (four) gets an entry for it; with room left
on the page the update is a heap-only tuple and no index is touched (common practice for
tables whose rows are updated once after insert). New partitions are created with the same
setting (store/partitions.py, FILLFACTOR); here the existing ones are set. Pages already
written keep their layout until rewritten. SQLite: nothing changes.

Revision ID: 0020_fillfactor
Revises: 0019_partitions
Create Date: 2026-12-03 17:30:00
"""

from collections.abc import Sequence

from alembic import op
from sqlalchemy import text

revision: str = "0020_fillfactor"
down_revision: str | None = "0019_partitions"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

FILLFACTOR = 80  # as store/partitions.py FILLFACTOR at the time of this migration


def _partitions() -> list[str]:
    bind = op.get_bind()
    return [
        str(name)
        for (name,) in bind.execute(
            text(
                "SELECT c.relname FROM pg_inherits i JOIN pg_class c ON c.oid = i.inhrelid"
                " WHERE i.inhparent = 'predictions'::regclass ORDER BY 1"
            )
        )
    ]


def upgrade() -> None:
    if op.get_bind().dialect.name != "postgresql":
        return
    for name in _partitions():
        op.execute(f"ALTER TABLE {name} SET (fillfactor = {FILLFACTOR})")


def downgrade() -> None:
    if op.get_bind().dialect.name != "postgresql":
        return
    for name in _partitions():
        op.execute(f"ALTER TABLE {name} RESET (fillfactor)")
