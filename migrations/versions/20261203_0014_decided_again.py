"""rule_windows.decided_again_at, .previous: a settled window decided again says so

A correction of a settled window's labels changes its counts, and its rules decide it again.
The row keeps when that happened and what the decision was before (breached, value,
p-value), so an alert and its events can say that a breach was revised.

Revision ID: 0014_decided_again
Revises: 0013_time_zone
Create Date: 2026-12-02 17:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0014_decided_again"
down_revision: str | None = "0013_time_zone"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on SQLite too (ADD and DROP COLUMN): a batch copy of `rule_windows` would drop
# the old table, and the ON DELETE CASCADE pointing at it would take rows with it.
def upgrade() -> None:
    op.add_column(
        "rule_windows", sa.Column("decided_again_at", sa.DateTime(timezone=True), nullable=True)
    )
    op.add_column(
        "rule_windows",
        sa.Column(
            "previous",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=True,
        ),
    )


def downgrade() -> None:
    for column in ("previous", "decided_again_at"):
        if op.get_bind().dialect.name == "sqlite":
            op.execute(f"ALTER TABLE rule_windows DROP COLUMN {column}")
        else:
            op.drop_column("rule_windows", column)
