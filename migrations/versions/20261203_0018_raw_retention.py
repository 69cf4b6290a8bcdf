"""models.raw_from_hour and dropped_ids: raw days dropped by retention, rollups kept

`raw_from_hour` is the epoch hour below which a model's raw rows (predictions and their
label history) have been dropped (null: none dropped). `dropped_ids` keeps the ids whose
raw rows were dropped, for one more keep_raw_days, so that a late label for one of them is
answered `expired` rather than left pending.

Revision ID: 0018_raw_retention
Revises: 0017_model_source
Create Date: 2026-12-03 06:40:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0018_raw_retention"
down_revision: str | None = "0017_model_source"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on SQLite too (ADD and DROP COLUMN, SQLite 3.35+): a batch copy of `models` would
# drop the old table, and its ON DELETE CASCADE would take every model's data with it.
def upgrade() -> None:
    op.add_column(
        "models",
        sa.Column("raw_from_hour", sa.Integer(), nullable=True, server_default=sa.text("NULL")),
    )
    op.create_table(
        "dropped_ids",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("pid", sa.String(length=128), nullable=False),
        sa.Column("hour", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_dropped_ids_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("model_id", "pid", name=op.f("pk_dropped_ids")),
    )
    op.create_index("ix_dropped_ids_model_hour", "dropped_ids", ["model_id", "hour"])


def downgrade() -> None:
    op.drop_index("ix_dropped_ids_model_hour", table_name="dropped_ids")
    op.drop_table("dropped_ids")
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE models DROP COLUMN raw_from_hour")
    else:
        op.drop_column("models", "raw_from_hour")
