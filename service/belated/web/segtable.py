"""The segment table of the model page: for one stored tag key, every admitted value side by
side with its latest settled and projected measures, counts and coverage, sortable, with the
values that breached a rule marked."""

from __future__ import annotations

import difflib
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from belated.errors import Problem
from belated.metrics import params
from belated.metrics.windows import MeasureOptions, windows_of_range
from belated.store import segments
from belated.store.tables import ModelRow

MEASURES = {
    "binary": ("precision", "recall", "fbeta", "positive_rate"),
    "multiclass": ("accuracy", "precision_macro", "recall_macro", "fbeta_macro"),
}
COUNTS = ("predictions", "labelled", "coverage")


@dataclass(frozen=True)
class Column:
    """One sortable column: its key in a row and its heading."""

    key: str
    title: str


def columns(kind: str, name_of: Any) -> list[Column]:
    """The table's columns, in order: value, counts, then each measure settled and projected."""
    out = [Column("value", "value"), Column("breached", "breached rules")]
    out += [Column(c, c) for c in COUNTS]
    for m in MEASURES[kind]:
        out.append(Column(m, f"{name_of(m)}, latest settled"))
        if kind == "binary":
            out.append(Column(f"{m}.projected", f"{name_of(m)}, latest projected"))
    return out


def tag_keys(session: Session, model: ModelRow) -> dict[str, list[str]]:
    """The model's stored tag keys, each with its admitted values, sorted."""
    return {
        k: sorted(v)
        for k, v in sorted(segments.admitted(session=session, model_id=model.id).items())
    }


def pick_key(
    keys: dict[str, list[str]], asked: str | None, alerts: list[dict[str, Any]]
) -> str | None:
    """The asked key (a 422 naming the closest stored ones when the model has no such key),
    else the first key an active alert names a segment of, else the first stored key."""
    if not asked:
        alerted = sorted(
            {str(a["segment"]).partition(":")[0] for a in alerts if a.get("segment")} & set(keys)
        )
        return alerted[0] if alerted else next(iter(keys), None)
    if asked not in keys:
        near = difflib.get_close_matches(asked, list(keys), n=3, cutoff=0.5) or list(keys)[:10]
        hint = f"; closest stored keys: {', '.join(near)}" if near else "; it has no tag key"
        raise Problem(422, f"'segments': this model has no tag key {asked!r}{hint}")
    return asked


def _latest(windows: list[dict[str, Any]], measure: str) -> tuple[Any, Any]:
    """The latest settled value and the latest projected value of unsettled windows."""
    settled = next(
        (
            w["measures"][measure]["value"]
            for w in reversed(windows)
            if w["settled"] and (w.get("measures", {}).get(measure) or {}).get("value") is not None
        ),
        None,
    )
    projected = next(
        (
            w["projected"][measure]["value"]
            for w in reversed(windows)
            if not w["settled"]
            and ((w.get("projected") or {}).get(measure) or {}).get("value") is not None
        ),
        None,
    )
    return settled, projected


def rows(
    session: Session,
    model: ModelRow,
    rng: params.Range,
    key: str,
    values: list[str],
    alerts: list[dict[str, Any]],
    beta: float,
    now: datetime,
    max_values: int,
) -> list[dict[str, Any]]:
    """One row per admitted value of `key` over the range (unsorted)."""
    wanted = MEASURES[model.kind]
    opts = MeasureOptions(beta=beta, measures=frozenset(wanted) if model.kind == "binary" else None)
    out = []
    for value in values:
        windows = windows_of_range(session, model, rng, opts, ((key, value),), now, max_values)
        n = sum(w["predictions"] for w in windows)
        labelled = sum(w["labelled"] for w in windows)
        row: dict[str, Any] = {
            "value": value,
            "predictions": n,
            "labelled": labelled,
            "coverage": labelled / n if n else None,
            "breached": sorted(
                {a["rule_text"] for a in alerts if a.get("segment") == f"{key}:{value}"}
            ),
        }
        for m in wanted:
            row[m], row[f"{m}.projected"] = _latest(windows, m)
        out.append(row)
    return out


def sort_rows(rows: list[dict[str, Any]], by: str, descending: bool) -> list[dict[str, Any]]:
    """Rows sorted on one column; empty cells last whichever the direction."""

    def key(r: dict[str, Any]) -> Any:
        v = r.get(by)
        if isinstance(v, list):
            v = len(v)
        return v

    present = [r for r in rows if key(r) is not None]
    missing = [r for r in rows if key(r) is None]
    return sorted(present, key=key, reverse=descending) + missing
