"""`belated keys create`: make an API token on the store directly."""

from __future__ import annotations

import typer

from belated.cli.service import store_url

keys_app = typer.Typer(help="API tokens.", no_args_is_help=True)


@keys_app.command("create")
def keys_create(
    project: str = typer.Option(..., help="Project name (created if needed)."),
    scopes: str = typer.Option("ingest,read", help="Comma list of ingest, read, admin."),
    name: str | None = typer.Option(None, help="A label for the token."),
    database_url: str | None = typer.Option(None, help="Overrides BELATED_DATABASE_URL."),
) -> None:
    """Create a token; it is printed alone on the last line, and never again."""
    from belated.store import keys
    from belated.store.db import make_engine, make_sessionmaker, transaction
    from belated.store.migrate import upgrade

    try:
        scope_list = keys.parse_scopes(scopes)
    except ValueError as exc:
        typer.echo(str(exc), err=True)
        raise typer.Exit(2) from None
    url = store_url(database_url)
    upgrade(url)
    engine = make_engine(url)
    with transaction(make_sessionmaker(engine)) as session:
        proj = keys.get_or_create_project(session=session, name=project)
        row, secret = keys.create(session=session, project_id=proj.id, scopes=scope_list, name=name)
    engine.dispose()
    typer.echo(f"project: {project}\nkey id: {row.id}\nscopes: {row.scopes}")
    typer.echo(secret)
