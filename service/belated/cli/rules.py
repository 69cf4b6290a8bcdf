"""`belated rules list|create|delete`: a model's alert rules over the API."""

from __future__ import annotations

import typer

from belated.cli.fields import SET, parse_sets
from belated.cli.options import FORMAT, MODEL, TOKEN, URL, ask, check_format, connect
from belated.cli.output import show, show_one

rules_app = typer.Typer(help="Alert rules of a model: list, create, delete.", no_args_is_help=True)
COLUMNS = (
    "id",
    "kind",
    "measure",
    "granularity",
    "threshold",
    "tolerance",
    "alpha",
    "segment_by",
    "muted",
    "retired_at",
)


@rules_app.command("list")
def rules_list(
    model: str = MODEL,
    retired: bool = typer.Option(False, "--retired", help="List retired rules too."),
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """List the model's rules."""
    check_format(fmt)
    with connect(url, token) as client:
        found = ask(lambda: client.rules(model, retired=retired))
    show(found, COLUMNS, fmt, f"{model}: {len(found)} rules")


@rules_app.command("create")
def rules_create(
    model: str = MODEL,
    kind: str = typer.Option(..., "--kind", help="floor, drop, shift, stall or traffic."),
    measure: str | None = typer.Option(None, "--measure", help="What the rule watches."),
    threshold: float | None = typer.Option(None, "--threshold", help="floor or shift level."),
    segment_by: str | None = typer.Option(None, "--segment-by", help="Fan out over a tag key."),
    sets: list[str] | None = SET,
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """Create a rule (an admin token); other fields with --set (tolerance, alpha, ...)."""
    check_format(fmt)
    given = {"measure": measure, "threshold": threshold, "segment_by": segment_by}
    fields = {"kind": kind, **{k: v for k, v in given.items() if v is not None}, **parse_sets(sets)}
    with connect(url, token) as client:
        show_one(ask(lambda: client.create_rule(model, **fields)), fmt)


@rules_app.command("delete")
def rules_delete(
    rule_id: str = typer.Argument(..., metavar="RULE_ID", help="The rule's id (rul_...)."),
    model: str = MODEL,
    url: str = URL,
    token: str = TOKEN,
) -> None:
    """Retire a rule (an admin token): it stops; its alerts and breaches stay."""
    with connect(url, token) as client:
        ask(lambda: client.delete_rule(model, rule_id))
    typer.echo(f"retired the rule {rule_id}")
