"""Validate prediction and label batches whole, before anything is written.

Plain functions over parsed JSON (no per-item pydantic models): a 10,000-item batch is
checked in a few milliseconds and every bad item is reported by index and field.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any, cast

from belated.classes import negative_class, positive_class
from belated.errors import Invalid, Problem, field_error
from belated.timeutil import parse_ts

MAX_ID = 128
MAX_TAGS = 16
MAX_TAG_LEN = 64
FUTURE_SLACK = timedelta(days=1)
SUM_TOLERANCE = 1e-4
MAX_ERRORS = 100


@dataclass(frozen=True, slots=True)
class ModelSpec:
    """What validation needs to know of a model."""

    kind: str
    classes: tuple[str, ...]
    positive: str | None
    threshold: float


@dataclass(slots=True)
class PredictionIn:
    """A validated prediction, normalised for storage."""

    pid: str
    ts: datetime
    score: float | None
    scores: dict[str, float] | None
    predicted: str
    tags: dict[str, str] | None

    def same_as(self, other: PredictionIn) -> bool:
        """Same stored content (a repeat is a duplicate, not a conflict)."""
        return (
            self.ts == other.ts
            and self.score == other.score
            and self.scores == other.scores
            and self.predicted == other.predicted
            and (self.tags or None) == (other.tags or None)
        )


@dataclass(slots=True)
class LabelIn:
    """A validated label."""

    pid: str
    actual: str
    ts: datetime


def class_value(value: Any) -> str | None:
    """Classes are strings; integers are accepted as their decimal string."""
    if isinstance(value, bool):
        return None
    if isinstance(value, int):
        return str(value)
    if isinstance(value, str):
        return value
    return None


def _items(body: Any, key: str, max_batch: int) -> list[Any]:
    if not isinstance(body, dict) or not isinstance(body.get(key), list):
        raise Invalid([field_error(None, key, f"the body must be an object with a list '{key}'")])
    items = body[key]
    if len(items) > max_batch:
        raise Problem(
            413,
            f"{len(items)} {key} in one request; the limit is {max_batch} "
            "(BELATED_MAX_BATCH). Split the batch. Nothing was stored.",
            title="Batch too large",
        )
    return cast(list[Any], items)


def _check_id(i: int, item: dict[str, Any], errors: list[dict[str, Any]]) -> str | None:
    pid = item.get("id")
    if isinstance(pid, int) and not isinstance(pid, bool):
        pid = str(pid)
    if not isinstance(pid, str) or not pid:
        errors.append(field_error(i, "id", "required, a non-empty string"))
        return None
    if len(pid) > MAX_ID:
        errors.append(field_error(i, "id", f"longer than {MAX_ID} characters"))
        return None
    if "\x00" in pid:
        errors.append(field_error(i, "id", "contains a NUL character"))
        return None
    return pid


def _check_ts(
    i: int, value: Any, now: datetime, errors: list[dict[str, Any]], required: bool
) -> datetime | None:
    if value is None:
        if required:
            errors.append(field_error(i, "ts", "required (RFC 3339 time)"))
        return None
    try:
        ts = parse_ts(value)
    except (ValueError, TypeError, OverflowError, OSError):
        errors.append(field_error(i, "ts", f"not an RFC 3339 time: {str(value)[:40]!r}"))
        return None
    if ts > now + FUTURE_SLACK:
        errors.append(field_error(i, "ts", "more than a day in the future"))
        return None
    return ts


def _finite_prob(value: Any) -> float | None:
    if type(value) is float and 0.0 <= value <= 1.0:  # the common case (NaN fails the test)
        return value
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    try:
        v = float(value)
    except OverflowError:  # an integer too large for a double
        return None
    return v if math.isfinite(v) and 0.0 <= v <= 1.0 else None


# Tag sets repeat (a few channels times a few regions): a set of string tags seen valid is
# answered from here, the same dict for every row that sends it (nothing changes it later).
# Only all-string sets are kept: 1 and 1.0 (and True) hash alike but are stored differently.
_TAGS_SEEN: dict[tuple[tuple[str, str], ...], dict[str, str] | None] = {}
_TAGS_SEEN_MAX = 4096


def _check_tags(i: int, value: Any, errors: list[dict[str, Any]]) -> dict[str, str] | None:
    if value is None:
        return None
    key = None
    if type(value) is dict:
        key = tuple(value.items())
        try:  # a kept set has strings only, and no number or boolean equals a string
            return _TAGS_SEEN[key]
        except KeyError:
            pass
        except TypeError:  # a list or an object among the values: not hashable
            key = None
    n_err = len(errors)
    tags = _tags_of(i, value, errors)
    if (
        key is not None
        and len(errors) == n_err
        and len(_TAGS_SEEN) < _TAGS_SEEN_MAX
        and all(type(v) is str for v in value.values())
    ):
        _TAGS_SEEN[key] = tags
    return tags


def _tags_of(i: int, value: Any, errors: list[dict[str, Any]]) -> dict[str, str] | None:
    if not isinstance(value, dict):
        errors.append(field_error(i, "tags", "must be an object of strings"))
        return None
    if len(value) > MAX_TAGS:
        errors.append(field_error(i, "tags", f"more than {MAX_TAGS} tags"))
        return None
    tags: dict[str, str] = {}
    for k, v in value.items():
        if not k or len(k) > MAX_TAG_LEN or ":" in k or "\x00" in k:
            errors.append(
                field_error(i, f"tags.{k[:64]}", "tag key must be 1-64 characters without ':'")
            )
            return None
        if isinstance(v, float) and not math.isfinite(v):
            errors.append(field_error(i, f"tags.{k}", "a number that is not finite"))
            return None
        if isinstance(v, int | float) and not isinstance(v, bool):
            v = str(v)
        if not isinstance(v, str) or len(v) > MAX_TAG_LEN or "\x00" in v:
            errors.append(field_error(i, f"tags.{k}", "tag value must be a string of at most 64"))
            return None
        tags[k] = v
    return tags or None


def _check_scores(
    i: int, item: dict[str, Any], spec: ModelSpec, errors: list[dict[str, Any]]
) -> tuple[float | None, dict[str, float] | None, bool]:
    """Return (score, scores, ok). Binary keeps the positive-class probability in `score`."""
    raw = item.get("scores")
    if raw is not None:
        if not isinstance(raw, dict) or not raw:
            errors.append(field_error(i, "scores", "must be an object of class: probability"))
            return None, None, False
        keys = {class_value(k) if not isinstance(k, str) else k for k in raw}
        if keys != set(spec.classes):
            errors.append(
                field_error(i, "scores", f"keys must be exactly the classes {list(spec.classes)}")
            )
            return None, None, False
        vals: dict[str, float] = {}
        for k, v in raw.items():
            p = _finite_prob(v)
            if p is None:
                errors.append(field_error(i, f"scores.{k}", "not a finite number in [0, 1]"))
                return None, None, False
            vals[str(k)] = p
        total = sum(vals.values())
        if abs(total - 1.0) > SUM_TOLERANCE:
            errors.append(field_error(i, "scores", f"sum to {total:.6g}, not 1 (within 1e-4)"))
            return None, None, False
        vals = {k: v / total for k, v in vals.items()}
        if spec.kind == "binary":
            return vals[positive_class(spec.positive, spec.classes)], None, True
        return max(vals.values()), vals, True
    if "score" not in item or item["score"] is None:
        if spec.kind == "multiclass":
            errors.append(field_error(i, "scores", "required for a multiclass model"))
        else:
            errors.append(field_error(i, "score", "required (or 'scores')"))
        return None, None, False
    if spec.kind == "multiclass":
        errors.append(field_error(i, "score", "a multiclass model takes 'scores', not 'score'"))
        return None, None, False
    p = _finite_prob(item["score"])
    if p is None:
        errors.append(field_error(i, "score", "not a finite number in [0, 1]"))
        return None, None, False
    return p, None, True


def _predicted(
    i: int,
    item: dict[str, Any],
    spec: ModelSpec,
    score: float | None,
    scores: dict[str, float] | None,
    errors: list[dict[str, Any]],
    pos_neg: tuple[str, str],
) -> str | None:
    raw = item.get("predicted")
    if raw is not None:
        value = class_value(raw)
        if value is None or value not in spec.classes:
            errors.append(
                field_error(i, "predicted", f"must be one of the classes {list(spec.classes)}")
            )
            return None
        return value
    if scores is not None:
        return max(spec.classes, key=lambda c: (scores[c], -spec.classes.index(c)))
    positive, negative = pos_neg
    return positive if score is not None and score >= spec.threshold else negative


def _positive_negative(spec: ModelSpec) -> tuple[str, str]:
    """A binary model's positive and negative class (a multiclass model's are not used)."""
    return (
        positive_class(spec.positive, spec.classes),
        negative_class(spec.positive, spec.classes),
    )


def _too_many(errors: list[dict[str, Any]]) -> bool:
    return len(errors) >= MAX_ERRORS


def validate_predictions(
    body: Any, spec: ModelSpec, *, now: datetime, max_batch: int
) -> list[PredictionIn]:
    """Check a whole predictions batch; raise Invalid listing every bad item (up to 100)."""
    items = _items(body, "predictions", max_batch)
    errors: list[dict[str, Any]] = []
    out: list[PredictionIn] = []
    seen: dict[str, int] = {}
    pos_neg = _positive_negative(spec)
    for i, item in enumerate(items):
        if _too_many(errors):
            break
        if not isinstance(item, dict):
            errors.append(field_error(i, "", "each prediction must be an object"))
            continue
        n_err = len(errors)
        pid = _check_id(i, item, errors)
        ts = _check_ts(i, item.get("ts"), now, errors, required=True)
        score, scores, ok = _check_scores(i, item, spec, errors)
        predicted = _predicted(i, item, spec, score, scores, errors, pos_neg) if ok else None
        tags = _check_tags(i, item.get("tags"), errors)
        if len(errors) > n_err or pid is None or ts is None or predicted is None:
            continue
        pred = PredictionIn(pid, ts, score, scores, predicted, tags)
        if pid in seen:
            first = out[seen[pid]]
            if not first.same_as(pred):
                errors.append(
                    field_error(
                        i,
                        "id",
                        f"id {pid!r} also at index {_index_of(items, pid)} with different content",
                    )
                )
            continue
        seen[pid] = len(out)
        out.append(pred)
    if errors:
        raise Invalid(errors)
    return out


def _index_of(items: list[Any], pid: str) -> int:
    for j, item in enumerate(items):
        if isinstance(item, dict) and str(item.get("id")) == pid:
            return j
    return -1


def validate_labels(body: Any, spec: ModelSpec, *, now: datetime, max_batch: int) -> list[LabelIn]:
    """Check a whole labels batch; `ts` defaults to the time of receipt."""
    items = _items(body, "labels", max_batch)
    errors: list[dict[str, Any]] = []
    out: list[LabelIn] = []
    first_at: dict[str, int] = {}
    for i, item in enumerate(items):
        if _too_many(errors):
            break
        if not isinstance(item, dict):
            errors.append(field_error(i, "", "each label must be an object"))
            continue
        n_err = len(errors)
        pid = _check_id(i, item, errors)
        actual = class_value(item.get("actual"))
        if actual is None or actual not in spec.classes:
            errors.append(
                field_error(i, "actual", f"required, one of the classes {list(spec.classes)}")
            )
        ts = _check_ts(i, item.get("ts"), now, errors, required=False)
        if len(errors) > n_err or pid is None or actual is None:
            continue
        label = LabelIn(pid, actual, ts or now)
        if pid in first_at:
            earlier = out[first_at[pid]]
            if earlier.actual != label.actual:
                errors.append(
                    field_error(
                        i,
                        "id",
                        f"id {pid!r} also at index {_index_of(items, pid)} "
                        "with a different 'actual'",
                    )
                )
                continue
        else:
            first_at[pid] = len(out)
        out.append(label)
    if errors:
        raise Invalid(errors)
    return out


def validate_ids(body: Any, *, max_batch: int) -> list[str]:
    """Check an erasure request `{"ids": [...]}`: ids as a prediction takes them (strings,
    or integers as their decimal string), at most `max_batch`; a repeat is erased once."""
    items = _items(body, "ids", max_batch)
    if not items:
        raise Invalid([field_error(None, "ids", "at least one id is required")])
    errors: list[dict[str, Any]] = []
    out: list[str] = []
    for i, value in enumerate(items):
        if _too_many(errors):
            break
        pid = _check_id(i, {"id": value}, errors)
        if pid is not None:
            out.append(pid)
    if errors:
        raise Invalid(errors)
    return list(dict.fromkeys(out))
