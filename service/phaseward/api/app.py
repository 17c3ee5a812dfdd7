"""The application factory: one app per settings object, no import-time state."""

from __future__ import annotations

from fastapi import FastAPI

from phaseward import __version__
from phaseward.api import errors
from phaseward.api.routes import analyses, events, rails, samples, stream, traces
from phaseward.settings import Settings
from phaseward.store.db import build_engine, build_sessionmaker, migrate


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()
    engine = build_engine(settings)
    migrate(engine)
    app = FastAPI(
        title="phaseward",
        version=__version__,
        summary="Keeps watch over multiphase power rails that can lose a phase and keep running.",
    )
    app.state.settings = settings
    app.state.engine = engine
    app.state.sessions = build_sessionmaker(engine)
    errors.install(app)
    app.include_router(rails.router)
    app.include_router(samples.router)
    app.include_router(stream.router)
    app.include_router(events.router)
    app.include_router(analyses.router)
    app.include_router(analyses.tools)
    app.include_router(traces.router)

    @app.get("/healthz", tags=["meta"])
    def healthz() -> dict[str, str]:
        return {"status": "ok", "version": __version__}

    return app
