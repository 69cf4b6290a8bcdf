"""initial schema

Revision ID: 0001_initial
Revises:
Create Date: 2026-12-01 22:53:00.223935
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0001_initial"
down_revision: str | None = None
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    op.create_table(
        "projects",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_projects")),
        sa.UniqueConstraint("name", name=op.f("uq_projects_name")),
    )
    op.create_table(
        "service_state",
        sa.Column("key", sa.String(length=64), nullable=False),
        sa.Column(
            "value",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=False,
        ),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.PrimaryKeyConstraint("key", name=op.f("pk_service_state")),
    )
    op.create_table(
        "models",
        sa.Column("id", sa.Integer(), nullable=False),
        sa.Column("project_id", sa.Integer(), nullable=False),
        sa.Column("name", sa.String(length=64), nullable=False),
        sa.Column("kind", sa.String(length=16), nullable=False),
        sa.Column(
            "classes",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=False,
        ),
        sa.Column("positive", sa.String(length=128), nullable=True),
        sa.Column("threshold", sa.Float(), nullable=False),
        sa.Column("label_delay_days", sa.Float(), nullable=False),
        sa.Column("min_coverage", sa.Float(), nullable=False),
        sa.Column("negative_after_days", sa.Float(), nullable=True),
        sa.Column(
            "segment_keys",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=True,
        ),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("updated_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["project_id"],
            ["projects.id"],
            name=op.f("fk_models_project_id_projects"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_models")),
        sa.UniqueConstraint("project_id", "name", name="uq_models_project_name"),
    )
    op.create_table(
        "tokens",
        sa.Column("id", sa.String(length=32), nullable=False),
        sa.Column("project_id", sa.Integer(), nullable=False),
        sa.Column("token_hash", sa.String(length=64), nullable=False),
        sa.Column("scopes", sa.String(length=64), nullable=False),
        sa.Column("name", sa.String(length=128), nullable=True),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.Column("revoked_at", sa.DateTime(timezone=True), nullable=True),
        sa.ForeignKeyConstraint(
            ["project_id"],
            ["projects.id"],
            name=op.f("fk_tokens_project_id_projects"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_tokens")),
        sa.UniqueConstraint("token_hash", name=op.f("uq_tokens_token_hash")),
    )
    op.create_table(
        "dirty_buckets",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("hour", sa.Integer(), nullable=False),
        sa.Column("version", sa.BigInteger(), nullable=False),
        sa.Column("marked_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_dirty_buckets_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("model_id", "hour", name=op.f("pk_dirty_buckets")),
    )
    op.create_table(
        "labels",
        sa.Column(
            "row_id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("pid", sa.String(length=128), nullable=False),
        sa.Column("actual", sa.String(length=128), nullable=False),
        sa.Column("ts", sa.DateTime(timezone=True), nullable=False),
        sa.Column("change", sa.String(length=16), nullable=False),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"], ["models.id"], name=op.f("fk_labels_model_id_models"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint("row_id", name=op.f("pk_labels")),
    )
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.create_index("ix_labels_model_pid", ["model_id", "pid"], unique=False)

    op.create_table(
        "pending_labels",
        sa.Column(
            "row_id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("pid", sa.String(length=128), nullable=False),
        sa.Column("actual", sa.String(length=128), nullable=False),
        sa.Column("ts", sa.DateTime(timezone=True), nullable=False),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_pending_labels_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("row_id", name=op.f("pk_pending_labels")),
        sa.UniqueConstraint("model_id", "pid", name="uq_pending_labels_model_pid"),
    )
    op.create_table(
        "predictions",
        sa.Column(
            "row_id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("pid", sa.String(length=128), nullable=False),
        sa.Column("ts", sa.DateTime(timezone=True), nullable=False),
        sa.Column("hour", sa.Integer(), nullable=False),
        sa.Column("score", sa.Float(), nullable=True),
        sa.Column(
            "scores",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=True,
        ),
        sa.Column("predicted", sa.String(length=128), nullable=False),
        sa.Column(
            "tags",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=True,
        ),
        sa.Column("actual", sa.String(length=128), nullable=True),
        sa.Column("label_ts", sa.DateTime(timezone=True), nullable=True),
        sa.Column("delay_h", sa.Float(), nullable=True),
        sa.Column("received_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_predictions_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("row_id", name=op.f("pk_predictions")),
        sa.UniqueConstraint("model_id", "pid", name="uq_predictions_model_pid"),
    )
    with op.batch_alter_table("predictions", schema=None) as batch_op:
        batch_op.create_index("ix_predictions_model_hour", ["model_id", "hour"], unique=False)
        batch_op.create_index("ix_predictions_model_ts", ["model_id", "ts"], unique=False)

    op.create_table(
        "rollups",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("level", sa.String(length=1), nullable=False),
        sa.Column("start", sa.Integer(), nullable=False),
        sa.Column("seg_key", sa.String(length=64), nullable=False),
        sa.Column("seg_value", sa.String(length=64), nullable=False),
        sa.Column("n_pred", sa.BigInteger(), nullable=False),
        sa.Column("n_labelled", sa.BigInteger(), nullable=False),
        sa.Column("n_implied", sa.BigInteger(), nullable=False),
        sa.Column("n_pred_pos", sa.BigInteger(), nullable=False),
        sa.Column("tp", sa.BigInteger(), nullable=False),
        sa.Column("fp", sa.BigInteger(), nullable=False),
        sa.Column("fn", sa.BigInteger(), nullable=False),
        sa.Column("tn", sa.BigInteger(), nullable=False),
        sa.Column("brier_sum", sa.Float(), nullable=False),
        sa.Column("logloss_sum", sa.Float(), nullable=False),
        sa.Column("exp_tp", sa.Float(), nullable=False),
        sa.Column("exp_fp", sa.Float(), nullable=False),
        sa.Column("exp_fn", sa.Float(), nullable=False),
        sa.Column("exp_tn", sa.Float(), nullable=False),
        sa.Column("hist", sa.LargeBinary(), nullable=True),
        sa.Column("delays", sa.LargeBinary(), nullable=True),
        sa.Column(
            "cells",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=True,
        ),
        sa.ForeignKeyConstraint(
            ["model_id"], ["models.id"], name=op.f("fk_rollups_model_id_models"), ondelete="CASCADE"
        ),
        sa.PrimaryKeyConstraint(
            "model_id", "level", "start", "seg_key", "seg_value", name=op.f("pk_rollups")
        ),
    )
    op.create_table(
        "segment_keys",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=64), nullable=False),
        sa.Column("admitted_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_segment_keys_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("model_id", "key", name=op.f("pk_segment_keys")),
    )
    op.create_table(
        "segment_values",
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("key", sa.String(length=64), nullable=False),
        sa.Column("value", sa.String(length=64), nullable=False),
        sa.Column("admitted_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_segment_values_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("model_id", "key", "value", name=op.f("pk_segment_values")),
    )
    op.create_table(
        "threshold_changes",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("model_id", sa.Integer(), nullable=False),
        sa.Column("threshold", sa.Float(), nullable=False),
        sa.Column("changed_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["model_id"],
            ["models.id"],
            name=op.f("fk_threshold_changes_model_id_models"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_threshold_changes")),
    )
    with op.batch_alter_table("threshold_changes", schema=None) as batch_op:
        batch_op.create_index(
            batch_op.f("ix_threshold_changes_model_id"), ["model_id"], unique=False
        )


def downgrade() -> None:
    with op.batch_alter_table("threshold_changes", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_threshold_changes_model_id"))

    op.drop_table("threshold_changes")
    op.drop_table("segment_values")
    op.drop_table("segment_keys")
    op.drop_table("rollups")
    with op.batch_alter_table("predictions", schema=None) as batch_op:
        batch_op.drop_index("ix_predictions_model_ts")
        batch_op.drop_index("ix_predictions_model_hour")

    op.drop_table("predictions")
    op.drop_table("pending_labels")
    with op.batch_alter_table("labels", schema=None) as batch_op:
        batch_op.drop_index("ix_labels_model_pid")

    op.drop_table("labels")
    op.drop_table("dirty_buckets")
    op.drop_table("tokens")
    op.drop_table("models")
    op.drop_table("service_state")
    op.drop_table("projects")
