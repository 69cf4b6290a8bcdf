"""`belated send predictions|labels FILE`: send a CSV or Parquet file to the service.

Exit codes: 0 done, 1 refused (a bad row, a refusal by the service, the service unreachable),
2 usage (options, a missing column, an unreadable file).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd
import typer

from belated.cli.files import Columns, frames, header, pick_format, prepare
from belated.cli.options import MODEL, TOKEN, URL, fail
from belated.cli.sender import SHOWN, Sender
from belated.client import BelatedError, Client, Unreachable, frame_items

send_app = typer.Typer(
    help="Send predictions or labels from a CSV or Parquet file.", no_args_is_help=True
)
FILE = typer.Argument(..., exists=True, dir_okay=False, help="A .csv (.csv.gz) or .parquet file.")
BATCH = typer.Option(10_000, "--batch-size", min=1, help="Rows per request.")
SKIP = typer.Option(False, "--skip-bad", help="Report and skip bad rows instead of stopping.")
FORMAT = typer.Option("auto", "--format", help="auto (by extension), csv or parquet.")
PROGRESS = typer.Option(
    None,
    "--progress/--no-progress",
    help="A progress bar on stderr (default: when stderr is a terminal).",
)
RETRIES = typer.Option(8, "--retries", min=0, help="Retries of a request the service missed.")
ID_COL = typer.Option("id", "--id-column", help="The column of prediction ids.")
TS_COL = typer.Option("ts", "--ts-column", help="The column of times (RFC 3339).")


def _spec(client: Client, model: str) -> Any:
    """The model's settings for checking rows here; None if this token may not read them."""
    from belated.ingest.validate import ModelSpec

    try:
        got = client.model(model)
    except Unreachable:
        raise
    except BelatedError as exc:
        if exc.status == 403:
            typer.echo(
                "note: the token cannot read the model; rows are checked by the service only",
                err=True,
            )
            return None
        raise fail(f"refused: {exc}") from None
    return ModelSpec(
        kind=got["kind"],
        classes=tuple(got["classes"]),
        positive=got["positive"],
        threshold=float(got["threshold"]),
    )


def _run(
    kind: str,
    path: Path,
    cols: Columns,
    model: str,
    url: str,
    token: str,
    batch_size: int,
    skip_bad: bool,
    fmt: str,
    progress: bool | None,
    retries: int,
) -> None:
    fmt = pick_format(path, fmt)
    names, total = header(path, fmt)
    mapping, unused = cols.mapping(names)
    if unused:
        typer.echo(f"note: columns not sent: {', '.join(unused)}", err=True)
    from rich.console import Console
    from rich.progress import Progress

    console = Console(stderr=True)
    with Client(url, token, batch_size=batch_size, retries=retries, refused_retries=0) as client:
        try:
            spec = _spec(client, model)
        except BelatedError as exc:  # unreachable after every retry
            raise fail(str(exc)) from None
        sender = Sender(client, model, kind, spec, skip_bad, "row" if fmt == "parquet" else "line")
        offset = 1 if fmt == "parquet" else 2  # CSV: the header is line 1
        bar = Progress(
            console=console, disable=not (console.is_terminal if progress is None else progress)
        )
        with bar:
            task = bar.add_task(f"{kind} to {model}", total=total)
            for frame in frames(path, fmt, batch_size):
                # Index rows by their place in the file, so that every report names it.
                frame.index = pd.RangeIndex(offset, offset + len(frame))
                offset += len(frame)
                frame = prepare(frame, mapping, csv=fmt == "csv")
                try:
                    sender.send(frame_items(frame), frame.index.tolist())
                except BelatedError as exc:  # unreachable after every retry
                    raise fail(f"{exc}\nbefore it: {sender.summary()}") from None
                bar.advance(task, len(frame))
    if sender.noted > SHOWN:
        typer.echo(f"... and {sender.noted - SHOWN} more bad rows, skipped", err=True)
    typer.echo(
        f"{kind} from {path.name}: {offset - (1 if fmt == 'parquet' else 2)} rows; "
        f"{sender.summary()}"
    )


@send_app.command("predictions")
def send_predictions(
    file: Path = FILE,
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
    batch_size: int = BATCH,
    skip_bad: bool = SKIP,
    file_format: str = FORMAT,
    progress: bool | None = PROGRESS,
    retries: int = RETRIES,
    id_column: str = ID_COL,
    ts_column: str = TS_COL,
    score_column: str = typer.Option("score", help="The score of a binary model."),
    score_prefix: str = typer.Option("score.", help="Prefix of per-class score columns."),
    predicted_column: str = typer.Option("predicted", help="The predicted class (optional)."),
    tag_prefix: str = typer.Option("tag.", help="Prefix of tag columns: tag.<key>."),
) -> None:
    """Send predictions: id, ts, score (or score.<class>), optional predicted and tag.<key>."""
    cols = Columns(
        "predictions",
        id=id_column,
        ts=ts_column,
        score=score_column,
        score_prefix=score_prefix,
        predicted=predicted_column,
        tag_prefix=tag_prefix,
    )
    _run(
        "predictions",
        file,
        cols,
        model,
        url,
        token,
        batch_size,
        skip_bad,
        file_format,
        progress,
        retries,
    )


@send_app.command("labels")
def send_labels(
    file: Path = FILE,
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
    batch_size: int = BATCH,
    skip_bad: bool = SKIP,
    file_format: str = FORMAT,
    progress: bool | None = PROGRESS,
    retries: int = RETRIES,
    id_column: str = ID_COL,
    ts_column: str = typer.Option("ts", "--ts-column", help="When the outcome was known."),
    actual_column: str = typer.Option("actual", help="The true class."),
) -> None:
    """Send labels: id, actual, optional ts (when the outcome became known)."""
    cols = Columns("labels", id=id_column, ts=ts_column, actual=actual_column)
    _run(
        "labels",
        file,
        cols,
        model,
        url,
        token,
        batch_size,
        skip_bad,
        file_format,
        progress,
        retries,
    )
