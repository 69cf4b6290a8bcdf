"""How the commands print what the service answers: a table, CSV or JSON."""

from __future__ import annotations

import csv
import io
import json
import sys
from collections.abc import Sequence
from typing import Any

import typer


def cell(value: Any) -> str:
    """One value as a table or CSV cell."""
    if value is None:
        return "-"
    if isinstance(value, list):
        return ",".join(str(v) for v in value)
    if isinstance(value, dict):
        return json.dumps(value, separators=(",", ":"), sort_keys=True)
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def show(items: Sequence[dict[str, Any]], columns: Sequence[str], fmt: str, title: str) -> None:
    """Print items as a table (the given columns), CSV (the same columns) or JSON (whole)."""
    if fmt == "json":
        typer.echo(json.dumps(list(items), indent=2, ensure_ascii=False))
        return
    if fmt == "csv":
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n")
        writer.writerow(columns)
        for item in items:
            writer.writerow(["" if item.get(c) is None else cell(item.get(c)) for c in columns])
        typer.echo(buf.getvalue(), nl=False)
        return
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    table = Table(title=title)
    for col in columns:
        table.add_column(col)
    for item in items:
        table.add_row(*(Text(cell(item.get(c))) for c in columns))  # Text: no markup
    Console(width=None if sys.stdout.isatty() else 240).print(table)


def show_one(item: dict[str, Any], fmt: str) -> None:
    """Print one object: JSON, or one `field: value` line each."""
    if fmt == "json":
        typer.echo(json.dumps(item, indent=2, ensure_ascii=False))
        return
    width = max((len(k) for k in item), default=0)
    for key, value in item.items():
        typer.echo(f"{key:<{width}}  {cell(value)}")
