"""The metrics answer flattened: one row per window, each measure as value, low and high."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

BASE_COLUMNS = (
    "start",
    "end",
    "closed",
    "settled",
    "predictions",
    "labelled",
    "implied_negatives",
    "coverage",
)


def _value(measure: dict[str, Any], key: str) -> float:
    v = measure.get(key)
    return np.nan if v is None else float(v)


def flatten_window(window: dict[str, Any]) -> dict[str, Any]:
    """One window of the metrics answer as a flat row."""
    row: dict[str, Any] = {k: window.get(k) for k in BASE_COLUMNS}
    row["coverage"] = np.nan if row["coverage"] is None else row["coverage"]
    confusion = window.get("confusion") or {}
    row.update({k: confusion[k] for k in ("tp", "fp", "fn", "tn") if k in confusion})
    for name, m in (window.get("measures") or {}).items():
        row[name], row[f"{name}_low"], row[f"{name}_high"] = (
            _value(m, "value"),
            _value(m, "low"),
            _value(m, "high"),
        )
    for name, m in (window.get("implied") or {}).items():
        if name in ("reference", "adjusted"):
            continue  # the reference period and the adjusted flag are not measures
        row[f"implied_{name}"] = (
            _value(m, "value") if isinstance(m, dict) else (np.nan if m is None else float(m))
        )
    for name, b in (window.get("bounds") or {}).items():
        row[f"{name}_bound_low"], row[f"{name}_bound_high"] = _value(b, "low"), _value(b, "high")
    # an unsettled window's projected measures (what it will read once its labels are in)
    for name, m in (window.get("projected") or {}).items():
        row[f"{name}_projected"], row[f"{name}_projected_low"], row[f"{name}_projected_high"] = (
            _value(m, "value"),
            _value(m, "low"),
            _value(m, "high"),
        )
    final = window.get("expected_final_coverage")
    row["expected_final_coverage"] = np.nan if final is None else float(final)
    row["settles_by"] = window.get("settles_by")
    for cls, measures in (window.get("per_class") or {}).items():
        for name, m in measures.items():
            row[f"{cls}.{name}"], row[f"{cls}.{name}_low"], row[f"{cls}.{name}_high"] = (
                _value(m, "value"),
                _value(m, "low"),
                _value(m, "high"),
            )
    return row


def windows_frame(answer: dict[str, Any]) -> pd.DataFrame:
    """The metrics answer as a DataFrame, one flat row per window; the rest in `attrs`."""
    frame = pd.DataFrame(
        [flatten_window(w) for w in answer["windows"]],
        columns=None if answer["windows"] else list(BASE_COLUMNS),
    )
    for col in ("start", "end"):
        frame[col] = pd.to_datetime(frame[col], utc=True)
    frame.attrs.update({k: v for k, v in answer.items() if k != "windows"})
    return frame
