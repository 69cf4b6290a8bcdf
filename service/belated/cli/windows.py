"""`belated windows`: the latest windows of a model, printed as a table, CSV or JSON."""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime
from typing import Any

import pandas as pd
import typer

from belated.cli.options import FORMAT, MODEL, TOKEN, URL, ask, check_format, connect, fail
from belated.client.windows import windows_frame
from belated.zones import DEFAULT_ZONE, is_utc, wall_text, zone

TAG = typer.Option(
    None,
    "--tag",
    metavar="KEY=VALUE",
    help="Only the predictions with this tag (repeatable, ANDed): --tag region=north.",
)


def _measure(frame: pd.DataFrame, name: str) -> str:
    """The column of a measure; multiclass models answer macro averages for the plain name."""
    for col in (name, f"{name}_macro"):
        if col in frame.columns:
            return col
    known = [
        str(c)
        for c in frame.columns
        if f"{c}_low" in frame.columns
        and "." not in str(c)
        and not str(c).endswith(("_projected", "_low", "_high"))
    ]
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


def tag_params(tags: list[str] | None) -> dict[str, str]:
    """--tag KEY=VALUE options as the API's tag.<key>=<value> parameters."""
    out: dict[str, str] = {}
    for item in tags or []:
        key, sep, value = item.partition("=")
        key = key.strip().removeprefix("tag.")
        if not sep or not key or not value:
            raise fail(f"--tag takes KEY=VALUE (for example region=north), not {item!r}", 2)
        if f"tag.{key}" in out:
            raise fail(f"--tag gives the key {key!r} twice; one value per key", 2)
        out[f"tag.{key}"] = value
    return out


def windows(
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
    granularity: str = typer.Option("day", help="hour, day or week."),
    last: int = typer.Option(14, min=1, max=1000, help="How many of the latest windows."),
    start: str | None = typer.Option(None, help="From this time (RFC 3339); overrides --last."),
    end: str | None = typer.Option(None, help="Up to this time (RFC 3339, exclusive)."),
    beta: float | None = typer.Option(None, help="β of the F-beta measure (default 1)."),
    measures: str = typer.Option("precision,recall,fbeta", help="A comma list of measures."),
    rolling: int = typer.Option(1, min=1, help="Merge each window with the N-1 before it."),
    tag: list[str] | None = TAG,
    fmt: str = FORMAT,
) -> None:
    """Print the latest windows: counts, coverage, settled, and measures with intervals."""
    from belated.timeutil import GRANULARITIES, window_step

    if granularity not in GRANULARITIES:
        raise fail(f"--granularity must be one of {', '.join(GRANULARITIES)}", 2)
    check_format(fmt)
    wanted = [m.strip() for m in measures.split(",") if m.strip()]
    params: dict[str, Any] = {"granularity": granularity, "rolling": rolling, "beta": beta}
    params.update(tag_params(tag))
    if start is None and end is None:
        # The service aligns `start` down and ends at its current window; ask for a little
        # more than needed so that a small clock difference cannot cut the range short.
        params["start"] = datetime.now(UTC) - (last + 1) * window_step(granularity)
    else:
        params.update(start=start, end=end)
    with connect(url, token) as client:
        answer = ask(lambda: client.metrics_json(model, **params))
    if start is None and end is None:
        answer["windows"] = answer["windows"][-last:]
    frame = windows_frame(answer)
    cols = [_measure(frame, m) for m in wanted]
    time_zone = str(answer.get("time_zone") or DEFAULT_ZONE)
    if fmt == "json":
        typer.echo(json.dumps(answer, indent=2, ensure_ascii=False))
    elif fmt == "csv":
        keep = ["start", "end", "closed", "settled", "predictions", "labelled", "coverage"]
        for c in cols:
            keep += [k for k in frame.columns if k == c or str(k).startswith(f"{c}_")]
        out = frame.loc[:, keep]
        if not is_utc(time_zone):
            # a zoned model's windows as the API gives them: local time with its offset
            out = out.assign(
                start=[w["start"] for w in answer["windows"]],
                end=[w["end"] for w in answer["windows"]],
            )
        typer.echo(out.to_csv(index=False, date_format="%Y-%m-%dT%H:%M:%SZ"), nl=False)
    else:
        _table(frame, model, granularity, cols, time_zone)


def _table(
    frame: pd.DataFrame, model: str, granularity: str, cols: list[str], time_zone: str
) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    table = Table(
        title=f"{model}: {len(frame)} {granularity} windows ({time_zone})",
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
    tz = zone(time_zone)
    if tz is not UTC:
        shape = "%Y-%m-%d %H:%M"  # a local midnight with its offset (23 and 25-hour days)
    for _, row in frame.iterrows():
        state = "open" if not row["closed"] else "settled" if row["settled"] else "provisional"
        coverage = "-" if pd.isna(row["coverage"]) else f"{row['coverage']:.1%}"
        cells = [
            wall_text(row["start"].to_pydatetime(), tz, shape),
            str(row["predictions"]),
            str(row["labelled"]),
            coverage,
            state,
            *(_cell(row, c) for c in cols),
        ]
        table.add_row(*(Text(c) for c in cells))  # Text: brackets are not markup
    Console(width=None if sys.stdout.isatty() else 240).print(table)
