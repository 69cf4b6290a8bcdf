"""Which tag keys and values a model has seen, and the closest known names to a typo.

Admitted keys and values (store/segments.py) are known without reading raw rows; other names
are looked up in the stored predictions' tags, a bounded number at a time.
"""

from __future__ import annotations

import difflib

from sqlalchemy import text
from sqlalchemy.orm import Session

from belated.store import segments
from belated.store.dialect import is_postgres
from belated.store.tables import ModelRow

MAX_SUGGESTIONS = 3
RAW_NAMES_SCANNED = 1000
LISTED = 10  # known names listed when none is close


def raw_exists(session: Session, model: ModelRow, key: str, value: str | None) -> bool:
    """Whether a stored prediction carries the key (with this value, when given). The key
    is bound as a value, never spliced into a JSON path, so keys of any text are found."""
    params: dict[str, object] = {"m": model.id, "k": key, "v": value}
    if is_postgres(session):
        cond = "tags ? :k" if value is None else "tags ->> :k = :v"
        sql = f"SELECT 1 FROM predictions WHERE model_id = :m AND {cond} LIMIT 1"
    else:
        cond = "j.key = :k" + ("" if value is None else " AND j.type = 'text' AND j.value = :v")
        sql = (
            "SELECT 1 FROM predictions, json_each(predictions.tags) AS j"
            f" WHERE predictions.model_id = :m AND predictions.tags IS NOT NULL AND {cond}"
            " LIMIT 1"
        )
    return session.execute(text(sql), params).first() is not None


def raw_keys(session: Session, model: ModelRow) -> list[str]:
    """Up to RAW_NAMES_SCANNED tag keys the model's stored predictions carry."""
    if is_postgres(session):
        sql = (
            "SELECT DISTINCT jsonb_object_keys(tags) AS k FROM predictions"
            " WHERE model_id = :m AND tags IS NOT NULL LIMIT :n"
        )
    else:
        sql = (
            "SELECT DISTINCT j.key FROM predictions, json_each(predictions.tags) AS j"
            " WHERE predictions.model_id = :m AND predictions.tags IS NOT NULL LIMIT :n"
        )
    rows = session.execute(text(sql), {"m": model.id, "n": RAW_NAMES_SCANNED})
    return [str(r[0]) for r in rows]


def raw_values(session: Session, model: ModelRow, key: str) -> list[str]:
    """Up to RAW_NAMES_SCANNED values of one tag key in the model's stored predictions."""
    if is_postgres(session):
        sql = (
            "SELECT DISTINCT tags ->> :k FROM predictions"
            " WHERE model_id = :m AND tags ? :k LIMIT :n"
        )
    else:
        sql = (
            "SELECT DISTINCT j.value FROM predictions, json_each(predictions.tags) AS j"
            " WHERE predictions.model_id = :m AND predictions.tags IS NOT NULL"
            " AND j.key = :k LIMIT :n"
        )
    found = session.execute(text(sql), {"m": model.id, "k": key, "n": RAW_NAMES_SCANNED})
    return [str(r[0]) for r in found if r[0] is not None]


def closest(word: str, known: list[str]) -> str:
    """ "; closest known: a, b" (or a few known names when none is close), for a refusal."""
    near = difflib.get_close_matches(word, known, n=MAX_SUGGESTIONS, cutoff=0.5)
    if near:
        return f"; closest known: {', '.join(near)}"
    if known:
        more = ", ..." if len(known) > LISTED else ""
        return f"; known: {', '.join(sorted(known)[:LISTED])}{more}"
    return ""


def unknown_filter(session: Session, model: ModelRow, key: str, value: str) -> str | None:
    """None when some prediction of the model carries key=value (or the key is admitted
    and the value is '(other)'); else why not, with the closest known names."""
    admitted = segments.admitted(session=session, model_id=model.id)
    known_values = admitted.get(key)
    if known_values is None and not raw_exists(session, model, key, None):
        near = closest(key, sorted(set(admitted) | set(raw_keys(session, model))))
        return f"no prediction of this model has the tag key {key!r}{near}"
    if known_values is not None and (value in known_values or value == segments.OTHER):
        return None
    if raw_exists(session, model, key, value):
        return None
    seen = sorted(set(known_values or []) | set(raw_values(session, model, key)))
    return f"no prediction of this model has {key}={value!r}{closest(value, seen)}"


def unknown_rule_key(session: Session, model: ModelRow, key: str) -> str | None:
    """None when a rule can fan out over (or watch) the tag key: a key the model declares in
    `segment_keys`, or, when it declares none, a key admitted or carried by its predictions
    while there is room for it among the admitted keys; else why not."""
    if model.segment_keys is not None:
        if key in model.segment_keys:
            return None
        declared = sorted(model.segment_keys)
        return (
            f"the model's segment_keys do not include {key!r}{closest(key, declared)}"
            if declared
            else f"the model declares no segment_keys, so it has no tag key {key!r}"
        )
    admitted = segments.admitted(session=session, model_id=model.id)
    if key in admitted:
        return None
    if raw_exists(session, model, key, None):
        if len(admitted) < segments.MAX_KEYS:
            return None
        return (
            f"the tag key {key!r} is not among the {segments.MAX_KEYS} keys that get rollups "
            f"({', '.join(sorted(admitted))}); name it in the model's segment_keys"
        )
    known = sorted(set(admitted) | set(raw_keys(session, model)))
    if not known:
        return (
            f"no prediction of this model has a tag yet, so {key!r} is unknown; send "
            "predictions first or declare the model's segment_keys"
        )
    return f"no prediction of this model has the tag key {key!r}{closest(key, known)}"
