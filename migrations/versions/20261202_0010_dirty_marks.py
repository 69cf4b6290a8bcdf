"""dirty_buckets: insert-only marks, so concurrent writers of one hour never update one row

Revision ID: 0010_dirty_marks
Revises: 0009_model_reference
Create Date: 2026-12-02 16:00:00

Each write adds a mark row (model, hour, recompute) under its own sequence number; the
refresh takes every mark of the hours it claims. The old table kept one row per (model, hour)
that every writer of that hour upserted: concurrent writers queued on it.
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0010_dirty_marks"
down_revision: str | None = "0009_model_reference"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_COPY = "model_id, hour, marked_at, recompute"


def _fk() -> sa.ForeignKeyConstraint:
    return sa.ForeignKeyConstraint(
        ["model_id"],
        ["models.id"],
        name=op.f("fk_dirty_buckets_model_id_models"),
        ondelete="CASCADE",
    )


# Nothing refers to dirty_buckets, so replacing the table (on SQLite too) cascades nowhere.
def upgrade() -> None:
    op.rename_table("dirty_buckets", "dirty_buckets_old")
    if op.get_bind().dialect.name == "postgresql":
        op.execute("ALTER TABLE dirty_buckets_old RENAME CONSTRAINT pk_dirty_buckets TO pk_dbo")
        op.execute(
            "ALTER TABLE dirty_buckets_old RENAME CONSTRAINT fk_dirty_buckets_model_id_models"
            " TO fk_dbo"
        )
    op.create_table(
        "dirty_buckets",
        sa.Column(
            "seq",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("hour", sa.Integer(), nullable=False),
        sa.Column("marked_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("recompute", sa.Boolean(), server_default=sa.true(), nullable=False),
        _fk(),
        sa.PrimaryKeyConstraint("seq", name=op.f("pk_dirty_buckets")),
    )
    op.create_index("ix_dirty_buckets_model_hour", "dirty_buckets", ["model_id", "hour"])
    op.execute(f"INSERT INTO dirty_buckets ({_COPY}) SELECT {_COPY} FROM dirty_buckets_old")
    op.drop_table("dirty_buckets_old")


def downgrade() -> None:
    op.rename_table("dirty_buckets", "dirty_buckets_new")
    if op.get_bind().dialect.name == "postgresql":
        op.execute("ALTER TABLE dirty_buckets_new RENAME CONSTRAINT pk_dirty_buckets TO pk_dbn")
        op.execute(
            "ALTER TABLE dirty_buckets_new RENAME CONSTRAINT fk_dirty_buckets_model_id_models"
            " TO fk_dbn"
        )
    op.drop_index("ix_dirty_buckets_model_hour", "dirty_buckets_new")
    op.create_table(
        "dirty_buckets",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("hour", sa.Integer(), nullable=False),
        sa.Column("version", sa.BigInteger(), nullable=False),
        sa.Column("marked_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("recompute", sa.Boolean(), server_default=sa.true(), nullable=False),
        _fk(),
        sa.PrimaryKeyConstraint("model_id", "hour", name=op.f("pk_dirty_buckets")),
    )
    # one row per (model, hour); any mark asking for a recompute keeps asking
    op.execute(
        "INSERT INTO dirty_buckets (model_id, hour, version, marked_at, recompute)"
        " SELECT model_id, hour, max(seq), max(marked_at),"
        " CASE WHEN sum(CASE WHEN recompute THEN 1 ELSE 0 END) > 0 THEN TRUE ELSE FALSE END"
        " FROM dirty_buckets_new GROUP BY model_id, hour"
    )
    op.drop_table("dirty_buckets_new")
