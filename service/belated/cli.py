"""The `belated` command: serve, worker, migrate, keys, and the tools built on the API."""

from __future__ import annotations

import sys

import typer

from belated.config import get_settings

app = typer.Typer(
    help="belated: monitoring for classifiers whose labels arrive late.",
    no_args_is_help=True,
    add_completion=False,
)
keys_app = typer.Typer(help="API tokens.", no_args_is_help=True)
app.add_typer(keys_app, name="keys")


def _url(database_url: str | None) -> str:
    return database_url or get_settings().database_url


@app.command()
def migrate(
    database_url: str | None = typer.Option(None, help="Overrides BELATED_DATABASE_URL."),
) -> None:
    """Apply the database migrations."""
    from belated.store.migrate import upgrade

    upgrade(_url(database_url))
    typer.echo("migrations applied")


@app.command()
def serve(
    host: str | None = typer.Option(None, help="Overrides BELATED_HOST."),
    port: int | None = typer.Option(None, help="Overrides BELATED_PORT."),
    no_jobs: bool = typer.Option(False, "--no-jobs", help="Serve the API without the jobs."),
) -> None:
    """Run the HTTP service (and the scheduled jobs unless --no-jobs)."""
    import uvicorn

    from belated.app import create_app
    from belated.logs import setup_logging
    from belated.store.db import is_sqlite
    from belated.store.migrate import upgrade

    settings = get_settings()
    setup_logging(settings.log_format)
    if is_sqlite(settings.database_url):
        upgrade(settings.database_url)  # the embedded store migrates itself
    # the options become the settings, so the service knows its own address (webhooks
    # must never point back at it)
    settings = settings.model_copy(
        update={"host": host or settings.host, "port": port if port is not None else settings.port}
    )
    asgi = create_app(settings, jobs=settings.jobs and not no_jobs)
    uvicorn.run(asgi, host=settings.host, port=settings.port, log_config=None, access_log=False)


@app.command()
def worker() -> None:
    """Run the scheduled jobs without the API (one elected leader runs them on PostgreSQL)."""
    import signal
    import threading

    from belated.jobs import JobRunner
    from belated.logs import setup_logging
    from belated.store.db import make_engine

    settings = get_settings()
    setup_logging(settings.log_format)
    runner = JobRunner(engine=make_engine(settings.database_url), settings=settings)
    stop = threading.Event()
    signal.signal(signal.SIGTERM, lambda *_: stop.set())
    signal.signal(signal.SIGINT, lambda *_: stop.set())
    runner.start()
    typer.echo("worker started", err=True)
    stop.wait()
    runner.stop()


@app.command()
def rebuild(
    model: str | None = typer.Option(None, help="Only this model (by name)."),
    project: str | None = typer.Option(None, help="The model's project."),
) -> None:
    """Recompute every rollup from raw rows."""
    from sqlalchemy import select

    from belated.store import refresh
    from belated.store.db import make_engine, make_sessionmaker
    from belated.store.tables import ModelRow, Project

    settings = get_settings()
    factory = make_sessionmaker(make_engine(settings.database_url))
    ids: list[int | None] = [None]
    if model is not None:
        with factory() as session:
            query = select(ModelRow.id).where(ModelRow.name == model)
            if project is not None:
                query = query.join(Project, Project.id == ModelRow.project_id).where(
                    Project.name == project
                )
            ids = list(session.scalars(query))
        if not ids:
            typer.echo(f"no model named {model!r}", err=True)
            raise typer.Exit(1)
    total = sum(
        refresh.rebuild(factory, max_values=settings.max_segment_values, model_id=i) for i in ids
    )
    typer.echo(f"rebuilt {total} hour buckets")


@app.command()
def demo(
    days: int = typer.Option(90, min=14, max=365, help="Days of orders to generate."),
    seed: int = typer.Option(1, help="Seed of the generator."),
    port: int = typer.Option(8000, help="Port to serve on (0: any free port)."),
) -> None:
    """Run the furniture-shop demo on a fresh SQLite file and keep serving it."""
    from belated import demo as demo_module

    demo_module.run(days=days, seed=seed, port=port, echo=typer.echo)


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
    url = _url(database_url)
    upgrade(url)
    engine = make_engine(url)
    with transaction(make_sessionmaker(engine)) as session:
        proj = keys.get_or_create_project(session=session, name=project)
        row, secret = keys.create(session=session, project_id=proj.id, scopes=scope_list, name=name)
    engine.dispose()
    typer.echo(f"project: {project}\nkey id: {row.id}\nscopes: {row.scopes}")
    typer.echo(secret)


def _register_data_commands() -> None:
    from belated.cli_data import register

    register(app)


_register_data_commands()


def main() -> None:
    """Entry point for `python -m belated`."""
    app(sys.argv[1:])
