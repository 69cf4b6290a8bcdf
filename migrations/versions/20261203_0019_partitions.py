"""PostgreSQL: raw predictions in daily partitions, (model, id) kept unique by a registry

`predictions` becomes a table partitioned by range of `hour`, one partition per UTC day and a
default partition; `prediction_ids` holds (model, id) → hour for every stored prediction,
so an id re-sent with another time is still found (store/partitions.py explains the
layout). Existing rows are copied into the new layout with their row ids. SQLite keeps its
single table: nothing changes there.

Revision ID: 0019_partitions
Revises: 0018_raw_retention
Create Date: 2026-12-03 06:40:00
"""

from collections.abc import Sequence

from alembic import op
from sqlalchemy import text

revision: str = "0019_partitions"
down_revision: str | None = "0018_raw_retention"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_COLUMNS = (
    "row_id, model_id, pid, ts, hour, score, scores, predicted, tags, actual, label_ts,"
    " delay_h, received_at"
)
_DEFINITION = """
  row_id bigint NOT NULL DEFAULT nextval('predictions_row_id_seq'::regclass),
  model_id integer NOT NULL,
  pid character varying(128) NOT NULL,
  ts timestamp with time zone NOT NULL,
  hour integer NOT NULL,
  score double precision,
  scores jsonb,
  predicted character varying(128) NOT NULL,
  tags jsonb,
  actual character varying(128),
  label_ts timestamp with time zone,
  delay_h double precision,
  received_at timestamp with time zone NOT NULL,
  CONSTRAINT fk_predictions_model_id_models FOREIGN KEY (model_id)
    REFERENCES models (id) ON DELETE CASCADE
"""
_INDEXES = ("ix_predictions_model_hour", "ix_predictions_model_ts")


def _day_name(day: int) -> str:
    from datetime import UTC, datetime, timedelta

    return f"predictions_p{(datetime(1970, 1, 1, tzinfo=UTC) + timedelta(days=day)):%Y%m%d}"


def upgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        return
    # the old table and its index names make way (index names are per schema)
    op.execute("ALTER TABLE predictions RENAME TO predictions_flat")
    op.execute(
        "ALTER TABLE predictions_flat RENAME CONSTRAINT pk_predictions TO pk_predictions_flat"
    )
    op.execute(
        "ALTER TABLE predictions_flat RENAME CONSTRAINT uq_predictions_model_pid"
        " TO uq_predictions_flat_model_pid"
    )
    op.execute(
        "ALTER TABLE predictions_flat RENAME CONSTRAINT fk_predictions_model_id_models"
        " TO fk_predictions_flat_model_id_models"
    )
    for name in _INDEXES:
        op.execute(f"ALTER INDEX {name} RENAME TO {name}_flat")
    op.execute(f"CREATE TABLE predictions ({_DEFINITION}) PARTITION BY RANGE (hour)")
    op.execute("ALTER TABLE predictions ADD CONSTRAINT pk_predictions PRIMARY KEY (row_id, hour)")
    op.execute(
        "CREATE UNIQUE INDEX uq_predictions_model_pid_hour ON predictions (model_id, pid, hour)"
    )
    op.execute("CREATE INDEX ix_predictions_model_hour ON predictions (model_id, hour)")
    op.execute("CREATE INDEX ix_predictions_model_ts ON predictions (model_id, ts)")
    op.execute("CREATE TABLE predictions_default PARTITION OF predictions DEFAULT")
    bind = op.get_bind()
    days = [
        int(d) for (d,) in bind.execute(text("SELECT DISTINCT hour / 24 FROM predictions_flat"))
    ]
    now_day = int(bind.execute(text("SELECT extract(epoch FROM now())")).scalar() or 0) // 86400
    for day in sorted(set(days) | set(range(now_day, now_day + 8))):
        op.execute(
            f"CREATE TABLE {_day_name(day)} PARTITION OF predictions"
            f" FOR VALUES FROM ({day * 24}) TO ({day * 24 + 24})"
        )
    op.execute(f"INSERT INTO predictions ({_COLUMNS}) SELECT {_COLUMNS} FROM predictions_flat")
    op.execute(
        "CREATE TABLE prediction_ids ("
        " model_id integer NOT NULL, pid character varying(128) NOT NULL,"
        " hour integer NOT NULL,"
        " CONSTRAINT pk_prediction_ids PRIMARY KEY (model_id, pid),"
        " CONSTRAINT fk_prediction_ids_model_id_models FOREIGN KEY (model_id)"
        " REFERENCES models (id) ON DELETE CASCADE)"
    )
    op.execute(
        "INSERT INTO prediction_ids (model_id, pid, hour)"
        " SELECT model_id, pid, hour FROM predictions_flat"
    )
    op.execute("ALTER SEQUENCE predictions_row_id_seq OWNED BY predictions.row_id")
    op.execute("DROP TABLE predictions_flat")
    op.execute("ANALYZE predictions")
    op.execute("ANALYZE prediction_ids")


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        return
    op.execute(
        f"CREATE TABLE predictions_flat ({_DEFINITION.replace('fk_predictions_', 'fk_pf_')})"
    )
    op.execute(f"INSERT INTO predictions_flat ({_COLUMNS}) SELECT {_COLUMNS} FROM predictions")
    op.execute("ALTER SEQUENCE predictions_row_id_seq OWNED BY predictions_flat.row_id")
    op.execute("DROP TABLE prediction_ids")
    op.execute("DROP TABLE predictions")  # with its partitions and indexes
    op.execute("ALTER TABLE predictions_flat RENAME TO predictions")
    op.execute(
        "ALTER TABLE predictions RENAME CONSTRAINT fk_pf_model_id_models TO fk_predictions_model_id_models"
    )
    op.execute("ALTER TABLE predictions ADD CONSTRAINT pk_predictions PRIMARY KEY (row_id)")
    op.execute(
        "ALTER TABLE predictions ADD CONSTRAINT uq_predictions_model_pid UNIQUE (model_id, pid)"
    )
    op.execute("CREATE INDEX ix_predictions_model_hour ON predictions (model_id, hour)")
    op.execute("CREATE INDEX ix_predictions_model_ts ON predictions (model_id, ts)")
