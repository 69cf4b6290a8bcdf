"""markers: dated notes on a model's timeline

A person marks what happened to a model and when ("supplier change in the north"); the
dashboard draws each marker on the model's charts. Markers go with their model.

Revision ID: 0012_markers
Revises: 0011_early_alerts
Create Date: 2026-12-03 12:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0012_markers"
down_revision: str | None = "0011_early_alerts"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "markers",
        sa.Column("id", sa.String(length=32), nullable=False),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("text", sa.Text(), nullable=False),
        sa.Column("author", sa.String(length=160), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_markers_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_markers")),
    )
    op.create_index("ix_markers_model_at", "markers", ["model_id", "at"])


def downgrade() -> None:
    op.drop_index("ix_markers_model_at", "markers")
    op.drop_table("markers")
