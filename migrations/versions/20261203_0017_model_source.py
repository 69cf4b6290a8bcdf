"""models.source: where a model's rollups come from ("http" raw rows, or "lake" uploads)

A lake-fed model takes no predictions or labels over HTTP: its rollup rows are computed
where the team's logs live (belated.lake) and uploaded whole hours at a time.

Revision ID: 0017_model_source
Revises: 0016_keep_raw_days
Create Date: 2026-12-03 01:20:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0017_model_source"
down_revision: str | None = "0016_keep_raw_days"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on SQLite too (ADD and DROP COLUMN, SQLite 3.35+): a batch copy of `models` would
# drop the old table, and its ON DELETE CASCADE would take every model's data with it.
def upgrade() -> None:
    op.add_column(
        "models",
        sa.Column("source", sa.String(8), nullable=False, server_default="http"),
    )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE models DROP COLUMN source")
    else:
        op.drop_column("models", "source")
