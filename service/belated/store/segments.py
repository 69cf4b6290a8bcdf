"""Which tag keys and values get rollups of their own (bounded cardinality).

A model names its `segment_keys`, or else the first 8 tag keys seen are admitted. Each key
admits at most BELATED_MAX_SEGMENT_VALUES values, in the order refreshes first see them;
later values roll up under '(other)'. The choice is stored, so a rebuild makes the same one.
"""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import ColumnElement, select, text
from sqlalchemy.orm import Session

from belated.clock import now
from belated.store.dialect import is_postgres
from belated.store.rollup_tables import SegmentKey, SegmentValue
from belated.store.tables import ModelRow, Prediction

MAX_KEYS = 8
OTHER = "(other)"


def tag_expr(key: str) -> ColumnElement[str]:
    """The SQL expression of one tag's value (NULL when the prediction lacks it)."""
    expr: ColumnElement[str] = Prediction.tags[key].as_string()
    return expr


def admitted(*, session: Session, model_id: int) -> dict[str, list[str]]:
    """Admitted keys, each with its admitted values."""
    keys: dict[str, list[str]] = {
        k: []
        for k in session.scalars(
            select(SegmentKey.key).where(SegmentKey.model_id == model_id).order_by(SegmentKey.key)
        )
    }
    for key, value in session.execute(
        select(SegmentValue.key, SegmentValue.value).where(SegmentValue.model_id == model_id)
    ):
        keys.setdefault(key, []).append(value)
    return keys


def current(*, session: Session, model: ModelRow) -> dict[str, list[str]]:
    """The admitted keys and values the model's rollups use now (admits nothing)."""
    keys = admitted(session=session, model_id=model.id)
    if model.segment_keys is not None:
        keys = {k: v for k, v in keys.items() if k in model.segment_keys}
    return keys


def _hours_filter(hours: Sequence[int]) -> ColumnElement[bool]:
    return Prediction.hour.in_(list(hours))


def _seen_keys(session: Session, model_id: int, hours: Sequence[int]) -> list[str]:
    params = {"m": model_id}
    hour_list = ",".join(str(int(h)) for h in hours)
    if is_postgres(session):
        sql = (
            f"SELECT DISTINCT jsonb_object_keys(tags) FROM predictions WHERE model_id = :m"
            f" AND hour IN ({hour_list}) AND tags IS NOT NULL"
        )
    else:
        sql = (
            f"SELECT DISTINCT j.key FROM predictions, json_each(predictions.tags) AS j"
            f" WHERE predictions.model_id = :m AND predictions.hour IN ({hour_list})"
            f" AND predictions.tags IS NOT NULL"
        )
    return sorted(str(r[0]) for r in session.execute(text(sql), params))


def admit(
    *, session: Session, model: ModelRow, hours: Sequence[int], max_values: int
) -> dict[str, list[str]]:
    """Admit the keys and values first seen in `hours`; return the admitted set."""
    current = admitted(session=session, model_id=model.id)
    stamp = now()
    wanted = list(model.segment_keys) if model.segment_keys is not None else None
    if wanted is not None:
        new_keys = [k for k in wanted if k not in current]
    elif len(current) < MAX_KEYS and hours:
        new_keys = [k for k in _seen_keys(session, model.id, hours) if k not in current]
        new_keys = new_keys[: MAX_KEYS - len(current)]
    else:
        new_keys = []
    for key in new_keys:
        session.add(SegmentKey(model_id=model.id, key=key, admitted_at=stamp))
        current[key] = []
    if wanted is not None:  # a model that names its keys drops the others from rollups
        current = {k: v for k, v in current.items() if k in wanted}
    for key, values in current.items():
        if len(values) >= max_values or not hours:
            continue
        expr = tag_expr(key)
        seen = session.scalars(
            select(expr)
            .distinct()
            .where(Prediction.model_id == model.id, _hours_filter(hours), expr.is_not(None))
        )
        fresh = sorted(v for v in seen if v not in values and v != OTHER)
        for value in fresh[: max_values - len(values)]:
            session.add(SegmentValue(model_id=model.id, key=key, value=value, admitted_at=stamp))
            values.append(value)
    session.flush()
    return current
