"""The application factory: one app per settings object, no import-time state."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI

from phaseward import __version__
from phaseward.api import errors, observability
from phaseward.api.auth import RateLimiter
from phaseward.api.routes import (
    analyses,
    events,
    rails,
    rehearsals,
    samples,
    stream,
    traces,
    web,
)
from phaseward.monitor import rehearsals as rehearsal_jobs
from phaseward.monitor.jobs import JobRunner
from phaseward.settings import Settings
from phaseward.store.db import build_engine, build_sessionmaker, migrate


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    engine = build_engine(settings)
    migrate(engine)
    sessions = build_sessionmaker(engine)
    runner = JobRunner(sessions, {rehearsal_jobs.KIND: rehearsal_jobs.run})

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        yield
        runner.shutdown()
        engine.dispose()

    app = FastAPI(
        title="phaseward",
        version=__version__,
        summary="Keeps watch over multiphase power rails that can lose a phase and keep running.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.sessions = sessions
    app.state.jobs = runner
    app.state.rate_limiter = RateLimiter(settings.rate_per_s, settings.rate_burst)
    runner.resume()  # jobs a stopped process left unfinished run again
    app.state.metrics = observability.Metrics()
    errors.install(app)
    observability.install(app)
    app.include_router(observability.router)
    app.include_router(rails.router)
    app.include_router(samples.router)
    app.include_router(stream.router)
    app.include_router(events.router)
    app.include_router(analyses.router)
    app.include_router(analyses.tools)
    app.include_router(traces.router)
    app.include_router(rehearsals.router)
    app.include_router(web.router)

    return app
