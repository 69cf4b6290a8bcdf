"""early looks: rule_windows.early; alerts.early, confirmed_at, cleared_reason

A rule with `early: true` (kept in its settings JSON, no column) also decides on unsettled
windows' projected measures. Such a decision is marked on its evaluated window
(`rule_windows.early`); an alert raised on early looks alone says so (`alerts.early`) until a
settled window confirms it (`confirmed_at`) or it is withdrawn (cleared, `cleared_reason`).
Existing rows were all decided on settled windows: false, null.

Revision ID: 0011_early_alerts
Revises: 0010_dirty_marks
Create Date: 2026-12-03 09:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0011_early_alerts"
down_revision: str | None = "0010_dirty_marks"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

ADDED = (
    ("rule_windows", "early"),
    ("alerts", "early"),
    ("alerts", "confirmed_at"),
    ("alerts", "cleared_reason"),
)


# In place on SQLite too (ADD and DROP COLUMN, SQLite 3.35+): a batch copy of `alerts` or
# `rule_windows` would drop the old table, and the ON DELETE CASCADE of the tables that
# point at it would take their rows with it.
def upgrade() -> None:
    op.add_column(
        "rule_windows",
        sa.Column("early", sa.Boolean(), server_default=sa.false(), nullable=False),
    )
    op.add_column(
        "alerts", sa.Column("early", sa.Boolean(), server_default=sa.false(), nullable=False)
    )
    op.add_column("alerts", sa.Column("confirmed_at", sa.DateTime(timezone=True), nullable=True))
    op.add_column("alerts", sa.Column("cleared_reason", sa.Text(), nullable=True))


def downgrade() -> None:
    # an alert still early becomes an ordinary raised alert (the revision before knew no other)
    for table, column in reversed(ADDED):
        if op.get_bind().dialect.name == "sqlite":
            op.execute(f"ALTER TABLE {table} DROP COLUMN {column}")
        else:
            op.drop_column(table, column)
