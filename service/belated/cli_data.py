"""The data commands of `belated`: send predictions or labels from a file, print windows.

Exit codes: 0 done, 1 refused (a bad row, a refusal by the service, the service unreachable),
2 usage (options, a missing column, an unreadable file).
"""

from __future__ import annotations

import math
import re
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pandas as pd
import typer

from belated.client import ANSWER_KEYS, BelatedError, Client, Unreachable, frame_items

send_app = typer.Typer(
    help="Send predictions or labels from a CSV or Parquet file.", no_args_is_help=True
)
SHOWN = 50  # bad rows printed one by one; later ones are only counted
URL = typer.Option(..., "--url", envvar="BELATED_URL", help="The service address.")
TOKEN = typer.Option(
    ...,
    "--token",
    envvar="BELATED_TOKEN",
    help="An API token: ingest scope to send, read to check rows and to show.",
)
MODEL = typer.Option(..., "--model", "-m", help="The model's name.")
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
SEGMENT = typer.Option(
    None, "--segment", help="Only the predictions with this tag, key:value (repeatable)."
)


def _fail(message: str, code: int = 1) -> typer.Exit:
    typer.echo(message, err=True)
    return typer.Exit(code)


@dataclass
class Columns:
    """Which file columns carry which API fields."""

    kind: str
    id: str = "id"
    ts: str = "ts"
    score: str = "score"
    score_prefix: str = "score."
    predicted: str = "predicted"
    tag_prefix: str = "tag."
    actual: str = "actual"

    def mapping(self, names: list[str]) -> tuple[dict[str, str], list[str]]:
        """File column -> API name, and the columns left unused."""
        if self.kind == "labels":
            fixed = {self.id: "id", self.actual: "actual", self.ts: "ts"}
        else:
            fixed = {self.id: "id", self.ts: "ts", self.score: "score", self.predicted: "predicted"}
        out: dict[str, str] = {}
        unused: list[str] = []
        for name in names:
            rest_s, rest_t = name[len(self.score_prefix) :], name[len(self.tag_prefix) :]
            if name in fixed:
                out[name] = fixed[name]
            elif self.kind == "predictions" and name.startswith(self.score_prefix) and rest_s:
                out[name] = "score." + rest_s
            elif self.kind == "predictions" and name.startswith(self.tag_prefix) and rest_t:
                out[name] = "tag." + rest_t
            else:
                unused.append(name)
        need = ["id", "actual"] if self.kind == "labels" else ["id", "ts"]
        missing = [n for n in need if n not in out.values()]
        if self.kind == "predictions" and not any(v.startswith("score") for v in out.values()):
            missing.append(f"{self.score} (or {self.score_prefix}<class> columns)")
        if missing:
            raise _fail(
                f"the file has no column for {', '.join(missing)}; its columns are "
                f"{', '.join(names)}. Name them with the --*-column options.",
                2,
            )
        return out, unused


def _format(path: Path, fmt: str) -> str:
    if fmt in ("csv", "parquet"):
        return fmt
    if fmt != "auto":
        raise _fail(f"--format must be auto, csv or parquet, not {fmt!r}", 2)
    return "parquet" if path.suffix.lower() in (".parquet", ".pq") else "csv"


def _header(path: Path, fmt: str) -> tuple[list[str], int | None]:
    """The column names and, when cheap to know, the number of rows."""
    try:
        if fmt == "parquet":
            import pyarrow.parquet as pq

            meta = pq.ParquetFile(path).metadata
            return list(meta.schema.to_arrow_schema().names), meta.num_rows
        names = [str(c) for c in pd.read_csv(path, nrows=0).columns]
    except Exception as exc:  # any reader error is an unreadable file, a usage error
        raise _fail(f"cannot read {path}: {exc}", 2) from None
    rows = None
    if path.suffix.lower() == ".csv":
        with path.open("rb") as f:
            rows = sum(chunk.count(b"\n") for chunk in iter(lambda: f.read(1 << 20), b"")) - 1
    return names, rows


def _frames(path: Path, fmt: str, size: int) -> Iterator[pd.DataFrame]:
    """The file in frames of `size` rows; CSV cells stay text so ids keep leading zeros."""
    if fmt == "parquet":
        import pyarrow.parquet as pq

        for batch in pq.ParquetFile(path).iter_batches(batch_size=size):
            yield batch.to_pandas()
        return
    # Blank lines are kept (and dropped later) so that row k is always on line k + 2.
    yield from pd.read_csv(
        path, dtype=str, keep_default_na=False, skip_blank_lines=False, chunksize=size
    )


def _number(text: Any) -> Any:
    """A CSV cell as a float; text that is no number stays text for the check to name."""
    if not isinstance(text, str) or text == "":
        return None
    try:
        value = float(text)
    except ValueError:
        return text
    return text if math.isnan(value) else value


def _prepare(frame: pd.DataFrame, names: dict[str, str], csv: bool) -> pd.DataFrame:
    """Rename to API names; CSV text becomes numbers and empty cells missing values."""
    frame = frame.loc[:, list(names)].rename(columns=names)
    if not csv:
        return frame
    frame = frame.loc[~frame.apply(lambda c: c.isna() | (c == "")).all(axis=1)]
    for col in frame.columns:
        values = frame[col].tolist()
        if col == "score" or col.startswith("score."):
            values = [_number(v) for v in values]
        elif col != "id":
            values = [v if isinstance(v, str) and v != "" else None for v in values]
        frame[col] = pd.Series(values, index=frame.index, dtype=object)
    return frame


@dataclass
class Sender:
    """Sends one file batch by batch, checking rows first and tallying the answers."""

    client: Client
    model: str
    kind: str
    spec: Any  # belated.ingest.validate.ModelSpec, or None when the token cannot read it
    skip_bad: bool
    where: str  # "line" for CSV, "row" for Parquet
    totals: dict[str, int] = field(default_factory=dict)
    skipped: int = 0
    noted: int = 0

    def _note(self, line: int, reason: str) -> None:
        self.noted += 1
        if self.noted <= SHOWN:
            typer.echo(f"{self.where} {line}: {reason}", err=True)

    def _local(self, items: list[dict[str, Any]], lines: list[int]) -> dict[int, str]:
        """Rows the service's own rules refuse, by index (the checks the service runs)."""
        if self.spec is None:
            return {}
        from belated.errors import Invalid
        from belated.ingest.validate import validate_labels, validate_predictions

        check = validate_predictions if self.kind == "predictions" else validate_labels
        alive, found = list(range(len(items))), {}
        while alive:
            try:
                check(
                    {self.kind: [items[i] for i in alive]},
                    self.spec,
                    now=datetime.now(UTC),
                    max_batch=len(alive),
                )
                break
            except Invalid as exc:
                bad = self._errors(exc.errors, [lines[i] for i in alive])
                found.update({alive[k]: why for k, why in bad.items()})
            if not self.skip_bad or not bad:
                break  # one round names the first bad rows; only --skip-bad needs them all
            alive = [i for k, i in enumerate(alive) if k not in bad]
        return found

    def _errors(self, errors: list[dict[str, Any]] | None, lines: list[int]) -> dict[int, str]:
        out: dict[int, str] = {}
        for err in errors or []:
            k = err.get("index")
            if not isinstance(k, int) or not 0 <= k < len(lines):
                continue
            reason = re.sub(
                r"at index (\d+)",
                lambda m: f"on {self.where} {lines[int(m[1])]}" if int(m[1]) < len(lines) else m[0],
                str(err.get("reason")),
            )
            where = f"field '{err.get('field')}': " if err.get("field") else ""
            out[k] = (out[k] + "; " if k in out else "") + where + reason
        return out

    def _refused(
        self, exc: BelatedError, items: list[dict[str, Any]], lines: list[int]
    ) -> dict[int, str]:
        """The rows a refusal names: a 422's item indexes, a 409's conflicting ids."""
        if exc.status == 422:
            return self._errors(exc.errors, lines)
        if exc.status == 409 and exc.problem.get("ids"):
            ids = {str(i) for i in exc.problem["ids"]}
            return {
                k: "already stored with different content (predictions are immutable)"
                for k, item in enumerate(items)
                if str(item.get("id")) in ids
            }
        return {}

    def send(self, items: list[dict[str, Any]], lines: list[int]) -> None:
        """Send one batch; stop (exit 1) on a bad row unless bad rows are skipped."""
        first, last = (lines[0], lines[-1]) if lines else (0, 0)
        bad = self._local(items, lines)
        while True:
            for k in sorted(bad):
                self._note(lines[k], bad[k])
            if bad and not self.skip_bad:
                raise _fail(
                    f"stopped: nothing of {self.where}s {first}-{last} was stored; "
                    f"before them: {self.summary()}. Fix the rows, or pass --skip-bad "
                    "to skip bad rows."
                )
            self.skipped += len(bad)
            items = [it for k, it in enumerate(items) if k not in bad]
            lines = [n for k, n in enumerate(lines) if k not in bad]
            if not items:
                return
            try:
                answer = self.client.send_batch(self.model, self.kind, items)
            except BelatedError as exc:
                bad = self._refused(exc, items, lines)
                if not bad:
                    raise _fail(
                        f"refused ({self.where}s {first}-{last}, nothing of them "
                        f"stored): {exc}\nbefore them: {self.summary()}"
                    ) from None
                continue
            for key in ANSWER_KEYS[self.kind]:
                self.totals[key] = self.totals.get(key, 0) + int(answer.get(key, 0))
            return

    def summary(self) -> str:
        """What was stored so far, in the service's words."""
        parts = [f"{self.totals.get(k, 0)} {k}" for k in ANSWER_KEYS[self.kind]]
        return ", ".join(parts + [f"{self.skipped} skipped"])


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
        raise _fail(f"refused: {exc}") from None
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
    fmt = _format(path, fmt)
    names, total = _header(path, fmt)
    mapping, unused = cols.mapping(names)
    if unused:
        typer.echo(f"note: columns not sent: {', '.join(unused)}", err=True)
    from rich.console import Console
    from rich.progress import Progress

    console = Console(stderr=True)
    with Client(url, token, batch_size=batch_size, retries=retries) as client:
        try:
            spec = _spec(client, model)
        except BelatedError as exc:  # unreachable after every retry
            raise _fail(str(exc)) from None
        sender = Sender(client, model, kind, spec, skip_bad, "row" if fmt == "parquet" else "line")
        offset = 1 if fmt == "parquet" else 2  # CSV: the header is line 1
        bar = Progress(
            console=console, disable=not (console.is_terminal if progress is None else progress)
        )
        with bar:
            task = bar.add_task(f"{kind} to {model}", total=total)
            for frame in _frames(path, fmt, batch_size):
                # Index rows by their place in the file, so that every report names it.
                frame.index = pd.RangeIndex(offset, offset + len(frame))
                offset += len(frame)
                frame = _prepare(frame, mapping, csv=fmt == "csv")
                try:
                    sender.send(frame_items(frame), frame.index.tolist())
                except BelatedError as exc:  # unreachable after every retry
                    raise _fail(f"{exc}\nbefore it: {sender.summary()}") from None
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


def _measure(frame: pd.DataFrame, name: str) -> str:
    """The column of a measure; multiclass models answer macro averages for the plain name."""
    for col in (name, f"{name}_macro"):
        if col in frame.columns:
            return col
    known = [c for c in frame.columns if f"{c}_low" in frame.columns and "." not in c]
    raise _fail(f"unknown measure {name!r}; choose from {', '.join(known)}", 2)


def _cell(row: pd.Series, col: str) -> str:
    value, low, high = row[col], row[f"{col}_low"], row[f"{col}_high"]
    if pd.isna(value):
        return "-"
    if pd.isna(low) or pd.isna(high):
        return f"{value:.3f}"
    return f"{value:.3f} [{low:.3f}, {high:.3f}]"


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
        raise _fail(f"--granularity must be one of {', '.join(GRANULARITIES)}", 2)
    # The service aligns `start` down and ends at its current window; ask for a little more
    # than needed so that a small clock difference cannot cut the range short.
    start = datetime.now(UTC) - (last + 1) * window_step(granularity)
    with Client(url, token, retries=3) as client:
        try:
            frame = client.metrics(
                model, granularity=granularity, start=start, rolling=rolling, segment=segment
            )
        except BelatedError as exc:
            raise _fail(f"refused: {exc}") from None
    frame = frame.tail(last)
    cols = [_measure(frame, m.strip()) for m in measures.split(",") if m.strip()]
    table = Table(
        title=f"{model}: latest {len(frame)} {granularity} windows (UTC)",
        caption=Text(
            "provisional: not settled, may change as labels arrive; open: "
            "the current window; [low, high]: 95% interval"
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


def register(app: typer.Typer) -> None:
    """Add `send` and `windows` to the `belated` app (a second call changes nothing)."""
    if not any(g.name == "send" for g in app.registered_groups):
        app.add_typer(send_app, name="send")
    if not any(
        (c.name or getattr(c.callback, "__name__", "")) == "windows"
        for c in app.registered_commands
    ):
        app.command("windows")(windows)
