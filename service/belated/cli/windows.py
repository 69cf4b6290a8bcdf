"""`belated windows`: the latest windows of a model, printed as a table."""

from __future__ import annotations

import sys
from datetime import UTC, datetime

import pandas as pd
import typer

from belated.cli.options import MODEL, TOKEN, URL, fail
from belated.client import BelatedError, Client

SEGMENT = typer.Option(
    None, "--segment", help="Only the predictions with this tag, key:value (repeatable)."
)


def _measure(frame: pd.DataFrame, name: str) -> str:
    """The column of a measure; multiclass models answer macro averages for the plain name."""
    for col in (name, f"{name}_macro"):
        if col in frame.columns:
            return col
    known = [c for c in frame.columns if f"{c}_low" in frame.columns and "." not in c]
    raise fail(f"unknown measure {name!r}; choose from {', '.join(known)}", 2)


def _interval(value: float, low: float, high: float) -> str:
    if pd.isna(value):
        return "-"
    if pd.isna(low) or pd.isna(high):
        return f"{value:.3f}"
    return f"{value:.3f} [{low:.3f}, {high:.3f}]"


def _cell(row: pd.Series, col: str) -> str:
    """A settled window's measure; an unsettled one's projected measure first, with the
    labelled-only value and the coverage bounds beside it (never the labelled value alone)."""
    labelled = _interval(row[col], row[f"{col}_low"], row[f"{col}_high"])
    projected = f"{col}_projected"
    if row.get("settled") or projected not in row.index:
        return labelled
    if pd.isna(row[projected]):
        return f"proj - · labelled {labelled}"
    shown = _interval(row[projected], row[f"{projected}_low"], row[f"{projected}_high"])
    bounds = ""
    if f"{col}_bound_low" in row.index and not pd.isna(row[f"{col}_bound_low"]):
        bounds = f" · bounds [{row[f'{col}_bound_low']:.3f}, {row[f'{col}_bound_high']:.3f}]"
    return f"proj {shown} · labelled {labelled}{bounds}"


def windows(
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
    granularity: str = typer.Option("day", help="hour, day or week (UTC)."),
    last: int = typer.Option(14, min=1, max=1000, help="How many of the latest windows."),
    measures: str = typer.Option("precision,recall,fbeta", help="A comma list of measures."),
    rolling: int = typer.Option(1, min=1, help="Merge each window with the N-1 before it."),
    segment: list[str] | None = SEGMENT,
) -> None:
    """Print the latest windows: counts, coverage, settled, and measures with intervals."""
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    from belated.timeutil import GRANULARITIES, window_step

    if granularity not in GRANULARITIES:
        raise fail(f"--granularity must be one of {', '.join(GRANULARITIES)}", 2)
    # The service aligns `start` down and ends at its current window; ask for a little more
    # than needed so that a small clock difference cannot cut the range short.
    start = datetime.now(UTC) - (last + 1) * window_step(granularity)
    with Client(url, token, retries=3) as client:
        try:
            frame = client.metrics(
                model, granularity=granularity, start=start, rolling=rolling, segment=segment
            )
        except BelatedError as exc:
            raise fail(f"refused: {exc}") from None
    frame = frame.tail(last)
    cols = [_measure(frame, m.strip()) for m in measures.split(",") if m.strip()]
    table = Table(
        title=f"{model}: latest {len(frame)} {granularity} windows (UTC)",
        caption=Text(
            "provisional: not settled, may change as labels arrive; its measures show first "
            "the projected value (what the window will read once its labels are in), then "
            "the labelled-only value and the coverage bounds; open: the current window; "
            "[low, high]: 95% interval"
        ),
    )
    for head in ("start", "predictions", "labelled", "coverage", "state", *cols):
        table.add_column(head, justify="left" if head in ("start", "state") else "right")
    shape = "%Y-%m-%d %H:%M" if granularity == "hour" else "%Y-%m-%d"
    for _, row in frame.iterrows():
        state = "open" if not row["closed"] else "settled" if row["settled"] else "provisional"
        coverage = "-" if pd.isna(row["coverage"]) else f"{row['coverage']:.1%}"
        cells = [
            row["start"].strftime(shape),
            str(row["predictions"]),
            str(row["labelled"]),
            coverage,
            state,
            *(_cell(row, c) for c in cols),
        ]
        table.add_row(*(Text(c) for c in cells))  # Text: brackets are not markup
    Console(width=None if sys.stdout.isatty() else 240).print(table)
