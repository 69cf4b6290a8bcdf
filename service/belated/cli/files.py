"""Reading a CSV or Parquet file for `belated send`: which columns carry which fields, and
the rows in frames of API items."""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from belated.cli.options import fail


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
            raise fail(
                f"the file has no column for {', '.join(missing)}; its columns are "
                f"{', '.join(names)}. Name them with the --*-column options.",
                2,
            )
        return out, unused


def pick_format(path: Path, fmt: str) -> str:
    if fmt in ("csv", "parquet"):
        return fmt
    if fmt != "auto":
        raise fail(f"--format must be auto, csv or parquet, not {fmt!r}", 2)
    return "parquet" if path.suffix.lower() in (".parquet", ".pq") else "csv"


def header(path: Path, fmt: str) -> tuple[list[str], int | None]:
    """The column names and, when cheap to know, the number of rows."""
    try:
        if fmt == "parquet":
            import pyarrow.parquet as pq

            meta = pq.ParquetFile(path).metadata
            return list(meta.schema.to_arrow_schema().names), meta.num_rows
        names = [str(c) for c in pd.read_csv(path, nrows=0).columns]
    except Exception as exc:  # any reader error is an unreadable file, a usage error
        raise fail(f"cannot read {path}: {exc}", 2) from None
    rows = None
    if path.suffix.lower() == ".csv":
        with path.open("rb") as f:
            rows = sum(chunk.count(b"\n") for chunk in iter(lambda: f.read(1 << 20), b"")) - 1
    return names, rows


def frames(path: Path, fmt: str, size: int) -> Iterator[pd.DataFrame]:
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


def prepare(frame: pd.DataFrame, names: dict[str, str], csv: bool) -> pd.DataFrame:
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
