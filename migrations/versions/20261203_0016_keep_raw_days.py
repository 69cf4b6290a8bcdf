"""models.keep_raw_days: how long raw rows and pending labels are kept (null: the default)

The default is the larger of label_delay_days and negative_after_days, plus 30 days; the
jobs drop pending labels older than that.

Revision ID: 0016_keep_raw_days
Revises: 0015_delays_by_band
Create Date: 2026-12-03 01:20:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0016_keep_raw_days"
down_revision: str | None = "0015_delays_by_band"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on SQLite too (ADD and DROP COLUMN, SQLite 3.35+): a batch copy of `models` would
# drop the old table, and its ON DELETE CASCADE would take every model's data with it.
def upgrade() -> None:
    op.add_column(
        "models",
        sa.Column("keep_raw_days", sa.Float(), nullable=True, server_default=sa.text("NULL")),
    )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE models DROP COLUMN keep_raw_days")
    else:
        op.drop_column("models", "keep_raw_days")
