"""The FastAPI application: routers, problem details, body limit, lifespan of the jobs."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI
from sqlalchemy import Engine

from belated import __version__
from belated.alerts import delivery
from belated.api import (
    openapi,
    problems,
    readonly,
    routes_alerts,
    routes_erasure,
    routes_health,
    routes_ingest,
    routes_keys,
    routes_markers,
    routes_metrics,
    routes_models,
    routes_pending,
    routes_prometheus,
    routes_rollups,
)
from belated.api.fastpath import SmallWrites
from belated.api.limits import BodyLimit
from belated.api.lookups import Lookups
from belated.config import Settings, get_settings
from belated.counters import Counters
from belated.store.db import make_engine, make_sessionmaker
from belated.store.grouped import GroupWriter


def create_app(
    settings: Settings | None = None, *, engine: Engine | None = None, jobs: bool | None = None
) -> Any:
    """Build the ASGI app; `jobs` overrides BELATED_JOBS (the scheduler in this process).

    With `settings.read_only` (a replica): read-only connections, no jobs, no refresh
    before reads, writes answered 405 (api/readonly.py)."""
    settings = settings or get_settings()
    read_only = settings.read_only
    engine = engine or make_engine(settings.database_url, read_only=read_only)
    run_jobs = (settings.jobs if jobs is None else jobs) and not read_only

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        runner = None
        if run_jobs:
            from belated.jobs import JobRunner

            runner = JobRunner(engine=engine, settings=settings)
            runner.start()
            app.state.jobs = runner
        try:
            yield
        finally:
            if runner is not None:
                runner.stop()

    app = FastAPI(
        title="belated",
        version=__version__,
        lifespan=lifespan,
        description="Monitoring for classifiers whose labels arrive late.",
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.sessions = make_sessionmaker(engine, stale_ok=read_only)
    app.state.counters = Counters()
    app.state.lookups = Lookups()
    app.state.group_writer = GroupWriter(app.state.sessions)
    app.state.jobs = None
    problems.install(app)
    app.state.outbox_backlog = delivery.backlog
    for module in (  # the ingest routes first: they take the most requests, matched in order
        routes_ingest,
        routes_rollups,
        routes_models,
        routes_erasure,
        routes_pending,
        routes_metrics,
        routes_alerts,
        routes_keys,
        routes_markers,
        routes_health,
        routes_prometheus,
    ):
        app.include_router(module.router)
    _optional_routers(app)
    openapi.install(app)
    if read_only:
        return readonly.wrap(app, BodyLimit(app, settings.max_body_bytes), engine)
    return BodyLimit(app, settings.max_body_bytes, SmallWrites(app.state))


def settle_heap() -> None:
    """Tune the cyclic garbage collector for a server process, once its app is built.

    Called by `belated serve` only, not by create_app: a process that builds many apps (the
    tests) would keep every frozen cycle it later drops.

    Everything alive at startup (modules, the app, the mappers: about 200,000 objects) moves
    to the permanent generation, so the collections that large request bodies trigger no
    longer walk it; and the youngest generation holds 50,000 objects before a collection
    rather than 700. The objects a request makes are freed by reference counting as before;
    only cycles wait longer. Measured on a 10,000-prediction request: the service's CPU fell
    from about 72 to about 43 ms (docs/benchmarks.md).
    """
    import gc

    gc.collect()  # what is garbage now is not frozen
    gc.freeze()
    gc.set_threshold(50_000, 20, 10)


def _optional_routers(app: FastAPI) -> None:
    """Routers of later capabilities, mounted when their modules exist."""
    import importlib

    for name in ("belated.web.routes",):
        try:
            module = importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name != name:
                raise
            continue
        app.include_router(module.router)
