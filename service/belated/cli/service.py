"""The service commands: migrate, serve, worker, rebuild and demo (they work on the store
directly, not through the API)."""

from __future__ import annotations

import typer

from belated.config import Settings, get_settings


def store_url(database_url: str | None) -> str:
    """The store's address: the option when given, else the settings."""
    return database_url or get_settings().database_url


def migrate(
    database_url: str | None = typer.Option(None, help="Overrides BELATED_DATABASE_URL."),
) -> None:
    """Apply the database migrations."""
    from belated.store.migrate import upgrade

    upgrade(store_url(database_url))
    typer.echo("migrations applied")


def serve(
    host: str | None = typer.Option(None, help="Overrides BELATED_HOST."),
    port: int | None = typer.Option(None, help="Overrides BELATED_PORT."),
    no_jobs: bool = typer.Option(False, "--no-jobs", help="Serve the API without the jobs."),
    workers: int = typer.Option(
        1,
        "--workers",
        min=1,
        help="API processes on the one port (PostgreSQL only); the jobs still run once, in"
        " whichever process holds the leader lock.",
    ),
    read_only: bool = typer.Option(
        False,
        "--read-only",
        help="Serve reads from a replica as they are, saying how stale (X-Belated-Staleness);"
        " no jobs, no migrations, writes answered 405. Also BELATED_READ_ONLY.",
    ),
    database_url: str | None = typer.Option(None, help="Overrides BELATED_DATABASE_URL."),
) -> None:
    """Run the HTTP service (and the scheduled jobs unless --no-jobs)."""
    import os

    import uvicorn

    from belated.app import create_app, settle_heap
    from belated.logs import setup_logging
    from belated.store.db import is_sqlite
    from belated.store.migrate import upgrade

    settings = _serve_settings(database_url, read_only)
    setup_logging(settings.log_format)
    if settings.read_only:
        _check_replica(settings.database_url)
    elif is_sqlite(settings.database_url):
        upgrade(settings.database_url)  # the embedded store migrates itself
    # the options become the settings, so the service knows its own address (webhooks
    # must never point back at it)
    settings = settings.model_copy(
        update={"host": host or settings.host, "port": port if port is not None else settings.port}
    )
    if workers > 1:
        if is_sqlite(settings.database_url):
            typer.echo(
                "--workers needs PostgreSQL: SQLite is served by one process"
                " (set BELATED_DATABASE_URL to a PostgreSQL database, or drop --workers)",
                err=True,
            )
            raise typer.Exit(2)
        # each process builds its app from the environment (api_process below)
        os.environ.update(
            BELATED_HOST=settings.host,
            BELATED_PORT=str(settings.port),
            BELATED_JOBS="true" if settings.jobs and not no_jobs else "false",
            BELATED_DATABASE_URL=settings.database_url,
            BELATED_READ_ONLY="true" if settings.read_only else "false",
        )
        uvicorn.run(
            "belated.cli.service:api_process",
            factory=True,
            workers=workers,
            host=settings.host,
            port=settings.port,
            log_config=None,
            access_log=False,
        )
        return
    asgi = create_app(settings, jobs=settings.jobs and not no_jobs)
    settle_heap()
    uvicorn.run(asgi, host=settings.host, port=settings.port, log_config=None, access_log=False)


def _serve_settings(database_url: str | None, read_only: bool) -> Settings:
    """The settings with serve's --database-url and --read-only applied (validated)."""
    settings = get_settings()
    update: dict[str, object] = {"read_only": settings.read_only or read_only}
    if database_url is not None:
        try:
            update["database_url"] = Settings.model_validate(
                {**settings.model_dump(), "database_url": database_url}
            ).database_url
        except ValueError as exc:
            typer.echo(f"belated serve: {exc}", err=True)
            raise typer.Exit(2) from None
    return settings.model_copy(update=update)


def _check_replica(url: str) -> None:
    """A read-only service refuses to start, before anything listens, on a store it cannot
    serve (it never migrates: a standby refuses writes)."""
    from belated.store.migrate import not_current

    reason = not_current(url)
    if reason is not None:
        typer.echo(f"belated serve --read-only: {reason}", err=True)
        raise typer.Exit(2)


def api_process() -> object:
    """The app of one of several API processes (`serve --workers N`), from the environment."""
    from belated.app import create_app, settle_heap
    from belated.logs import setup_logging

    settings = get_settings()
    setup_logging(settings.log_format)
    app = create_app(settings)
    settle_heap()
    return app


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


def demo(
    days: int = typer.Option(90, min=14, max=365, help="Days of orders to generate."),
    seed: int = typer.Option(1, help="Seed of the generator (the same seed, the same story)."),
    port: int = typer.Option(8000, help="Port to serve on (0: any free port)."),
    database_url: str | None = typer.Option(
        None, help="The store to use; default ./belated-demo.db (replaced on each run)."
    ),
) -> None:
    """Run the furniture-shop demo in ./belated-demo.db and keep serving it."""
    from belated.demo import run
    from belated.demo.serve import DemoError

    try:
        run(days=days, seed=seed, port=port, echo=typer.echo, database_url=database_url)
    except DemoError as exc:
        typer.echo(f"belated demo: {exc}", err=True)
        raise typer.Exit(1) from None
