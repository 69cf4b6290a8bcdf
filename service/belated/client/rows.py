"""Rows as API items: plain JSON values, RFC 3339 times, DataFrames and dicts folded alike."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, date, datetime
from typing import Any, cast

import numpy as np
import pandas as pd


def rfc3339(value: datetime | date | pd.Timestamp) -> str:
    """RFC 3339 in UTC with a Z suffix; naive times are taken as UTC."""
    if not isinstance(value, datetime):
        value = datetime(value.year, value.month, value.day)
    if value.tzinfo is None:
        value = value.replace(tzinfo=UTC)
    return value.astimezone(UTC).isoformat().replace("+00:00", "Z")


def plain(value: Any) -> Any:
    """A JSON-ready copy: numpy scalars via .item(), times as RFC 3339, NaN and NaT as None."""
    if value is None or value is pd.NaT or value is pd.NA:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, pd.Timestamp):  # RFC 3339 stops at microseconds
        value = value.floor("us").to_pydatetime()
    if isinstance(value, datetime | date):
        return rfc3339(value)
    if isinstance(value, float) and value != value:
        return None
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple | np.ndarray):
        return [plain(v) for v in value]
    return value


def _column(series: pd.Series) -> list[Any]:
    """A column as plain Python values (times as RFC 3339, missing as None)."""
    if isinstance(series.dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_dtype(series):
        utc = series.dt.tz_convert("UTC") if series.dt.tz is not None else series
        stamps = utc.to_numpy(dtype="datetime64[us]")
        whole = bool((stamps.astype("int64") % 1_000_000 == 0).all())
        text = np.datetime_as_string(stamps, unit="s" if whole else "us")
        return [None if t == "NaT" else t + "Z" for t in text.tolist()]
    if pd.api.types.is_float_dtype(series):
        return [None if v != v else v for v in series.to_numpy(dtype=float).tolist()]
    if pd.api.types.is_integer_dtype(series) and not series.hasnans:
        return list(series.to_numpy(dtype=np.int64).tolist())
    if isinstance(series.dtype, pd.StringDtype):
        return [v if isinstance(v, str) else None for v in series.tolist()]
    return [plain(v) for v in series.tolist()]


def frame_items(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows of a DataFrame as API items.

    Columns keep their API names (`id`, `ts`, `score`, `scores`, `predicted`, `tags`,
    `actual`); `score.<class>` columns make the `scores` map and `tag.<key>` columns the
    `tags`. Missing values are left out.
    """
    cols = {str(c): _column(frame[c]) for c in frame.columns}
    scores = [c for c in cols if c.startswith("score.")]
    tags = [c for c in cols if c.startswith("tag.")]
    fields = [c for c in cols if c not in scores and c not in tags]
    for name in ("predicted", "actual"):
        # Class values are strings or integers; a float column (an integer column with
        # gaps) holds 1.0 where the class is 1.
        if name in cols and pd.api.types.is_float_dtype(frame[name]):
            cols[name] = [int(v) if v is not None and v.is_integer() else v for v in cols[name]]
    items: list[dict[str, Any]] = []
    for i in range(len(frame)):
        item = {f: v for f in fields if (v := cols[f][i]) is not None}
        if scores:
            item["scores"] = {c[6:]: cols[c][i] for c in scores}
        if tags:
            found = {c[4:]: v for c in tags if (v := cols[c][i]) is not None and v != ""}
            if found:
                item["tags"] = found
        items.append(item)
    return items


def chunks(rows: pd.DataFrame | list[dict[str, Any]], size: int) -> Iterator[list[dict[str, Any]]]:
    for start in range(0, len(rows), size):
        if isinstance(rows, pd.DataFrame):
            yield frame_items(rows.iloc[start : start + size])
        else:
            yield [dict_item(item) for item in rows[start : start + size]]


def dict_item(row: dict[str, Any]) -> dict[str, Any]:
    """A dict row as an API item; `score.<class>` and `tag.<key>` keys fold as in frames."""
    item = plain(row)
    for prefix, key in (("score.", "scores"), ("tag.", "tags")):
        flat = [k for k in item if k.startswith(prefix)]
        if flat:
            found = {k[len(prefix) :]: item.pop(k) for k in flat}
            found = {k: v for k, v in found.items() if key == "scores" or v not in (None, "")}
            if found:
                item[key] = {**(item.get(key) or {}), **found}
    return cast(dict[str, Any], item)
