"""rollups.cut renamed negative_cutoff (the implied-negative cutoff an hour was aggregated with)

Revision ID: 0005_negative_cutoff
Revises: 0004_alert_sequences
Create Date: 2026-12-02 13:00:00
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0005_negative_cutoff"
down_revision: str | None = "0004_alert_sequences"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    with op.batch_alter_table("rollups", schema=None) as batch_op:
        batch_op.alter_column("cut", new_column_name="negative_cutoff")


def downgrade() -> None:
    with op.batch_alter_table("rollups", schema=None) as batch_op:
        batch_op.alter_column("negative_cutoff", new_column_name="cut")
