"""CSV downloads of the dashboard's tables, from the same page data the HTML shows."""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable, Sequence
from typing import Any

TABLES = ("windows", "segments", "drift", "rules", "alerts", "breaches")


def _cell(v: Any) -> Any:
    if v is None:
        return ""
    if isinstance(v, list):
        return "; ".join(str(x) for x in v)
    if isinstance(v, float):
        return f"{v:.6g}"
    return v


def to_csv(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> str:
    """RFC 4180 text: a header line, then one line per row."""
    buf = io.StringIO()
    out = csv.writer(buf, lineterminator="\r\n")
    out.writerow(header)
    for r in rows:
        out.writerow([_cell(v) for v in r])
    return buf.getvalue()


def model_table(page: dict[str, Any], table: str) -> str:
    """One table of the model page as CSV."""
    if table == "windows":
        measures = [c["measure"] for c in page["charts"]]
        return to_csv(
            ["start", "end", "predictions", "labelled", "coverage", "settled", *measures],
            (
                [w["start"], w["end"], w["predictions"], w["labelled"], w["coverage"], w["settled"]]
                + [(w.get("measures", {}).get(m) or {}).get("value") for m in measures]
                for w in page["windows"]
            ),
        )
    if table == "drift":
        keys = ("score_psi", "score_js", "positive_rate_change")
        return to_csv(
            ["start", "end", "predictions", *keys, "against_start", "against_end", "reason"],
            (
                [w["start"], w["end"], w["predictions"]]
                + [(w.get("drift") or {}).get(k) for k in keys]
                + [((w.get("drift") or {}).get("against") or {}).get(k) for k in ("start", "end")]
                + [(w.get("drift") or {}).get("reason")]
                for w in page["windows"]
            ),
        )
    if table == "segments":
        cols = page["seg_columns"]
        return to_csv(
            ["key", *[c.key for c in cols]],
            ([page["segkey"], *[r.get(c.key) for c in cols]] for r in page["seg_rows"]),
        )
    if table == "rules":
        fields = [
            "id",
            "kind",
            "measure",
            "granularity",
            "threshold",
            "tolerance",
            "alpha",
            "segment_by",
            "low",
            "high",
            "muted",
        ]
        return to_csv(fields, ([getattr(r, f) for f in fields] for r in page["rules"]))
    return alerts_table(page["alerts"], table)


def alerts_table(alerts: list[dict[str, Any]], table: str) -> str:
    """The alerts (one line each) or their breaches (one line per breach) as CSV."""
    if table == "alerts":
        fields = [
            "id",
            "state",
            "model",
            "segment",
            "rule_id",
            "rule_text",
            "started_at",
            "description",
        ]
        return to_csv(
            [*fields, "breaches"],
            ([a.get(f) for f in fields] + [len(a["breaches"])] for a in alerts),
        )
    fields = ["window_start", "window_end", "breached", "value", "low", "high", "p_value", "early"]
    return to_csv(
        ["alert", "segment", *fields],
        (
            [a["id"], a.get("segment"), *[b.get(f) for f in fields]]
            for a in alerts
            for b in a["breaches"]
        ),
    )
