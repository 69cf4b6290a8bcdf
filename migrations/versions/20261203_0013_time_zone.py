"""models.time_zone: the IANA zone whose midnights start a model's day and week windows

Revision ID: 0013_time_zone
Revises: 0012_markers
Create Date: 2026-12-02 16:40:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0013_time_zone"
down_revision: str | None = "0012_markers"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on SQLite too (ADD and DROP COLUMN, SQLite 3.35+): a batch copy of `models` would
# drop the old table, and its ON DELETE CASCADE would take every model's data with it.
def upgrade() -> None:
    op.add_column(
        "models",
        sa.Column("time_zone", sa.String(64), nullable=False, server_default="UTC"),
    )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE models DROP COLUMN time_zone")
    else:
        op.drop_column("models", "time_zone")
