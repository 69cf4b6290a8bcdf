"""label changes folded into rollups by difference

Revision ID: 0003_label_changes
Revises: 0002_alerts
Create Date: 2026-12-02 03:30:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0003_label_changes"
down_revision: str | None = "0002_alerts"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "label_changes",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("hour", sa.Integer(), nullable=False),
        sa.Column("row_id", sa.BigInteger(), nullable=False),
        sa.Column("old_actual", sa.String(length=128), nullable=True),
        sa.Column("old_delay_h", sa.Float(), nullable=True),
        sa.Column("new_actual", sa.String(length=128), nullable=False),
        sa.Column("new_delay_h", sa.Float(), nullable=True),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_label_changes_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_label_changes")),
    )
    with op.batch_alter_table("label_changes", schema=None) as batch_op:
        batch_op.create_index("ix_label_changes_model_hour", ["model_id", "hour"], unique=False)
    with op.batch_alter_table("dirty_buckets", schema=None) as batch_op:
        # marks made before this revision are treated as needing a recompute
        batch_op.add_column(
            sa.Column("recompute", sa.Boolean(), server_default=sa.true(), nullable=False)
        )
    with op.batch_alter_table("rollups", schema=None) as batch_op:
        batch_op.add_column(sa.Column("cut", sa.DateTime(timezone=True), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("rollups", schema=None) as batch_op:
        batch_op.drop_column("cut")
    with op.batch_alter_table("dirty_buckets", schema=None) as batch_op:
        batch_op.drop_column("recompute")
    with op.batch_alter_table("label_changes", schema=None) as batch_op:
        batch_op.drop_index("ix_label_changes_model_hour")
    op.drop_table("label_changes")
