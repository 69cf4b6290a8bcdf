"""PostgreSQL: one server-side function finds and locks the predictions of a labels batch

`label_targets(model, ids)` reads each id's hour from the registry, then each day's rows
from that day's partition (named: one small statement per day, planned on its own), locked
in partition then id order, the order every other statement that locks predictions by id
keeps (store/by_day.py). One round trip instead of two, and no statement that spans every
touched day: for 20 ids over 16 days, 1.6 against 2.9 ms; for 1,000 ids over 60 days, 16.7
against 27.4 ms (1M predictions, bench/scale.py's look-up; docs/benchmarks.md). SQLite has
no partitions: nothing changes there.

Revision ID: 0022_label_targets
Revises: 0021_data_without_fk
Create Date: 2026-12-04 17:10:00
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0022_label_targets"
down_revision: str | None = "0021_data_without_fk"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

# A day's partition is predictions_pYYYYMMDD (store/partitions.py day_name); a day without
# one keeps its rows in the default partition. Ids are ordered as bytes (COLLATE "C"), which
# for UTF-8 is the code-point order Python sorts in. `hour + 0`: no index on the hour may be
# chosen for a young partition without statistics (store/by_day.py).
_FUNCTION = r"""
CREATE FUNCTION label_targets(m integer, ids text[])
RETURNS TABLE (pid text, row_id bigint, ts timestamptz, hour integer, actual text,
  delay_h double precision, at text, tbl text)
LANGUAGE plpgsql VOLATILE AS $body$
DECLARE
  d record;
BEGIN
  FOR d IN
    SELECT x.tbl, array_agg(x.pid ORDER BY x.pid COLLATE "C") AS pids,
      array_agg(x.hour ORDER BY x.pid COLLATE "C") AS hours
    FROM (
      SELECT k.pid, r.hour, coalesce(
        to_regclass('predictions_p' || to_char(
          to_timestamp(r.hour::double precision * 3600) AT TIME ZONE 'UTC', 'YYYYMMDD'))::text,
        'predictions_default') AS tbl
      FROM unnest(ids) AS k(pid)
      CROSS JOIN LATERAL (
        SELECT r.hour FROM prediction_ids r WHERE r.model_id = m AND r.pid = k.pid OFFSET 0
      ) r
    ) x
    GROUP BY x.tbl ORDER BY x.tbl COLLATE "C"
  LOOP
    IF cardinality(d.pids) = 1 THEN
      RETURN QUERY EXECUTE format(
        'SELECT p.pid::text, p.row_id, p.ts, p.hour, p.actual::text, p.delay_h,'
        ' p.ctid::text, %L FROM %I p'
        ' WHERE p.model_id = $1 AND p.pid = $2 AND p.hour + 0 = $3 FOR UPDATE', d.tbl, d.tbl)
        USING m, d.pids[1], d.hours[1];
    ELSE
      RETURN QUERY EXECUTE format(
        'SELECT p.* FROM unnest($2::text[], $3::integer[]) AS k(pid, hour) CROSS JOIN LATERAL'
        ' (SELECT p.pid::text, p.row_id, p.ts, p.hour, p.actual::text, p.delay_h,'
        ' p.ctid::text, %L FROM %I p'
        ' WHERE p.model_id = $1 AND p.pid = k.pid AND p.hour + 0 = k.hour FOR UPDATE) p',
        d.tbl, d.tbl)
        USING m, d.pids, d.hours;
    END IF;
  END LOOP;
END
$body$
"""


def upgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        return
    op.execute(_FUNCTION)


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        return
    op.execute("DROP FUNCTION label_targets(integer, text[])")
