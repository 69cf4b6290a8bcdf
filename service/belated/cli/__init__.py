"""The `belated` command.

service.py   migrate, serve, worker, rebuild, demo (on the store, not through the API)
keys.py      keys list|create|revoke (create also on the store, for the first token)
models.py    models list|show|create|update|delete
rules.py     rules list|create|delete
alerts.py    alerts list|note
markers.py   markers add|list|delete
send.py      send predictions|labels FILE (files.py reads the file, sender.py sends it)
lake.py      lake run: rollups of a lake-fed model computed on DuckDB or Spark, uploaded
windows.py   windows: the latest windows as a table, CSV or JSON
erase.py     erase --model M FILE: predictions erased by id (ids one per line)
options.py   the options and the exit the data commands share; output.py prints answers
helptext.py  help text without type artefacts
"""

from __future__ import annotations

import sys

import typer

from belated.cli import helptext, service
from belated.cli.alerts import alerts_app
from belated.cli.erase import erase
from belated.cli.keys import keys_app
from belated.cli.lake import lake_app
from belated.cli.markers import markers_app
from belated.cli.models import models_app
from belated.cli.rules import rules_app
from belated.cli.send import send_app
from belated.cli.windows import windows

helptext.install()

app = typer.Typer(
    help="belated: monitoring for classifiers whose labels arrive late.",
    no_args_is_help=True,
    add_completion=False,
)
for command in (service.migrate, service.serve, service.worker, service.rebuild, service.demo):
    app.command()(command)

GROUPS = {
    "keys": keys_app,
    "models": models_app,
    "rules": rules_app,
    "alerts": alerts_app,
    "markers": markers_app,
    "send": send_app,
    "lake": lake_app,
}


def register(app: typer.Typer) -> None:
    """Add the commands that talk to the API to the `belated` app (a second call changes
    nothing)."""
    have = {g.name for g in app.registered_groups}
    for name, group in GROUPS.items():
        if name not in have:
            app.add_typer(group, name=name)
    for name, command in (("windows", windows), ("erase", erase)):
        if not any(
            (c.name or getattr(c.callback, "__name__", "")) == name for c in app.registered_commands
        ):
            app.command(name)(command)


register(app)


def main() -> None:
    """Entry point for `python -m belated`."""
    app(sys.argv[1:])
