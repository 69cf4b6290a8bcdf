"""`--set key=value` options: settings given on the command line, read as JSON when they
parse as JSON (numbers, lists, objects, true/false/null) and as text otherwise."""

from __future__ import annotations

import json
from typing import Any

import typer

from belated.cli.options import fail

SET = typer.Option(
    None,
    "--set",
    metavar="KEY=VALUE",
    help="A setting, repeatable: --set threshold=0.3 --set 'segment_keys=[\"region\"]'"
    " (values are JSON when they parse as JSON, else text).",
)


def parse_sets(items: list[str] | None) -> dict[str, Any]:
    """The settings given with --set, by name."""
    out: dict[str, Any] = {}
    for item in items or []:
        key, sep, raw = item.partition("=")
        key = key.strip()
        if not sep or not key:
            raise fail(f"--set takes KEY=VALUE, not {item!r}", 2)
        try:
            out[key] = json.loads(raw)
        except ValueError:
            out[key] = raw
    return out
