"""`belated keys list|create|revoke`: API tokens.

`keys create --project P` works on the store directly (the way to the first admin token);
without --project, and for list and revoke, the commands go through the API with an admin
token of the project.
"""

from __future__ import annotations

import typer

from belated.cli.options import FORMAT, TOKEN, URL, ask, check_format, connect, fail
from belated.cli.output import show

keys_app = typer.Typer(help="API tokens: list, create, revoke.", no_args_is_help=True)
COLUMNS = ("id", "name", "scopes", "created_at", "revoked_at")
OPTIONAL_URL = typer.Option(None, "--url", envvar="BELATED_URL", help="The service address.")
OPTIONAL_TOKEN = typer.Option(
    None, "--token", envvar="BELATED_TOKEN", help="An admin token of the project."
)


@keys_app.command("create")
def keys_create(
    project: str | None = typer.Option(
        None,
        help="Create the token on the store directly, in this project (created if it does"
        " not exist, and the output says so). Without it: through the API.",
    ),
    scopes: str = typer.Option("ingest,read", help="Comma list of ingest, read, admin."),
    name: str | None = typer.Option(None, help="A label for the token."),
    database_url: str | None = typer.Option(None, help="Overrides BELATED_DATABASE_URL."),
    url: str | None = OPTIONAL_URL,
    token: str | None = OPTIONAL_TOKEN,
) -> None:
    """Create a token; it is printed alone on the last line, and never again."""
    from belated.store import keys

    try:
        scope_list = keys.parse_scopes(scopes)
    except ValueError as exc:
        raise fail(str(exc), 2) from None
    if project is None:
        if not url or not token:
            raise fail(
                "give --project to create the token on the store, or --url and an admin"
                " --token (or BELATED_URL and BELATED_TOKEN) to create it through the API",
                2,
            )
        with connect(url, token) as client:
            made = ask(lambda: client.create_key(scope_list, name))
        typer.echo(f"key id: {made['id']}\nscopes: {','.join(made['scopes'])}")
        typer.echo(made["token"])
        return
    _on_store(project, scope_list, name, database_url)


def _on_store(project: str, scopes: list[str], name: str | None, database_url: str | None) -> None:
    from sqlalchemy import select

    from belated.cli.service import store_url
    from belated.store import keys
    from belated.store.db import make_engine, make_sessionmaker, transaction
    from belated.store.migrate import upgrade
    from belated.store.tables import Project

    url = store_url(database_url)
    upgrade(url)
    engine = make_engine(url)
    with transaction(make_sessionmaker(engine)) as session:
        new = session.scalar(select(Project.id).where(Project.name == project)) is None
        proj = keys.get_or_create_project(session=session, name=project)
        row, secret = keys.create(session=session, project_id=proj.id, scopes=scopes, name=name)
    engine.dispose()
    said = " (new: no project had this name, so it was created)" if new else ""
    typer.echo(f"project: {project}{said}\nkey id: {row.id}\nscopes: {row.scopes}")
    typer.echo(secret)


@keys_app.command("list")
def keys_list(
    revoked: bool = typer.Option(False, "--revoked", help="List revoked tokens too."),
    url: str = URL,
    token: str = TOKEN,
    fmt: str = FORMAT,
) -> None:
    """List the project's tokens (never their secrets; an admin token)."""
    check_format(fmt)
    with connect(url, token) as client:
        found = ask(lambda: client.keys(revoked=revoked))
    show(found, COLUMNS, fmt, f"{len(found)} tokens")


@keys_app.command("revoke")
def keys_revoke(
    key_id: str = typer.Argument(..., metavar="KEY_ID", help="The token's id (key_...)."),
    url: str = URL,
    token: str = TOKEN,
) -> None:
    """Revoke a token of the project (an admin token)."""
    with connect(url, token) as client:
        ask(lambda: client.revoke_key(key_id))
    typer.echo(f"revoked {key_id}")
