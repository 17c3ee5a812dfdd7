"""The application factory: one app per settings object, no import-time state."""

from __future__ import annotations

import asyncio
import logging
import math
import time
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from typing import Any

from fastapi import FastAPI
from fastapi.concurrency import run_in_threadpool
from sqlalchemy import Engine
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session, sessionmaker
from threadpoolctl import threadpool_limits

from phaseward import __version__
from phaseward.api import errors, observability
from phaseward.api.auth import Gate, RateLimiter
from phaseward.api.deps import Clock
from phaseward.api.group_commit import GroupCommit
from phaseward.api.routes import (
    analyses,
    captures,
    docs,
    events,
    rails,
    rehearsals,
    samples,
    stream,
    traces,
    web,
)
from phaseward.api.schemas.glossary import describe
from phaseward.api.schemas.samples import BODY_COMPONENTS
from phaseward.monitor import rail_model, retention
from phaseward.monitor import rehearsals as rehearsal_jobs
from phaseward.monitor.ingest import Tolerances, Tuning, judge_ahead
from phaseward.monitor.jobs import JobRunner
from phaseward.monitor.judge_apart import JudgeApart
from phaseward.monitor.resident import Ahead, LiveStates, Waiting
from phaseward.settings import Settings
from phaseward.store import partitions
from phaseward.store import samples as stored_samples
from phaseward.store.db import build_engine, build_sessionmaker, close_engine, migrate, transaction


async def _retention_loop(settings: Settings, sessions: sessionmaker[Session]) -> None:
    """Reduce old samples on a schedule while the server runs (when retention is configured)."""
    if settings.retain_raw_s is None:
        return
    while True:
        try:
            await run_in_threadpool(
                retention.run, sessions, older_than_s=settings.retain_raw_s,
                interval_s=settings.summary_interval_s,
            )  # fmt: skip
        except Exception:  # a failed pass is logged and tried again next time
            logging.getLogger(__name__).exception("retention pass failed")
        await asyncio.sleep(settings.retention_every_s)


def _unjudged(sessions: sessionmaker[Session]) -> list[str]:
    """Rails with samples left waiting by a stop; none when the database cannot say (the
    server starts anyway, and a rail's next sample judges them)."""
    try:
        with transaction(sessions) as session:
            return stored_samples.rails_not_judged(session)
    except DBAPIError:
        logging.getLogger(__name__).exception("looking for samples left unjudged failed")
        return []


SETTLE_EVERY_S = 0.1  # the settling loop looks for due rails this often (at most)
SETTLE_RAILS = 4  # rails a settling group holds: requests queued meanwhile go between groups


def settle_pause_s(judge_within_s: float) -> float:
    """How long the settling loop sleeps between looks: a quarter of the waiting window, at
    most ``SETTLE_EVERY_S``. With no window (0: samples are judged in their own request) only
    rails left unjudged by a stop are ever marked, and a pause of 0 would spin the event loop
    on an empty look, taking a core's share from every request."""
    if judge_within_s <= 0:
        return SETTLE_EVERY_S
    return min(SETTLE_EVERY_S, judge_within_s / 4)


async def _settle_loop(group_commit: GroupCommit, tuning: Tuning) -> None:
    """Judge the samples of rails whose first waiting sample has waited ``judge_within_s``,
    a few rails a group through the group commit (one writer), so that requests queued
    meanwhile wait for one small group, not for a whole fleet's falling due at once; at once
    at start for samples stored and not judged before a restart. Each group's passes run
    ahead, outside the writer (:func:`judge_ahead`), while the group before is stored: the
    writer only stores what they found, and the passes of a fleet keep pace with it."""
    waiting = tuning.waiting
    if waiting is None:
        return
    while True:
        due = waiting.due(tuning.monotonic(), tuning.judge_within_s)
        storing: asyncio.Task[None] | None = None
        for start in range(0, len(due), SETTLE_RAILS):
            group = due[start : start + SETTLE_RAILS]
            await run_in_threadpool(judge_ahead, group, tuning)
            if storing is not None:
                await storing
            storing = asyncio.create_task(group_commit.settle(group))
        if storing is not None:
            await storing
        await asyncio.sleep(settle_pause_s(tuning.judge_within_s))


async def _partition_loop(settings: Settings, engine: Engine) -> None:
    """PostgreSQL: keep the time partitions of samples made ahead (a no-op on SQLite)."""
    while True:
        await asyncio.sleep(PARTITION_ROLL_EVERY_S)
        try:
            await run_in_threadpool(roll_partitions, engine, settings)
        except Exception:  # logged; the default partition holds samples until the next roll
            logging.getLogger(__name__).exception("partition roll failed")


PARTITION_ROLL_EVERY_S = 3600.0  # with three or more periods made ahead, hourly is ample


def roll_partitions(engine: Engine, settings: Settings) -> int:
    return partitions.roll(engine, period_s=settings.partition_s, ahead=settings.partitions_ahead)


def create_app(settings: Settings | None = None, *, clock: Clock = time.time) -> FastAPI:
    """``clock`` is the service's clock (epoch seconds): the clock policy refuses samples dated
    ahead of it, and ages are measured on it. Tests pass a fixed one."""
    settings = settings or Settings()
    threadpool_limits(limits=settings.blas_threads, user_api="blas")  # for the whole process
    engine = build_engine(settings)
    migrate(engine)
    try:
        roll_partitions(engine, settings)
    except DBAPIError:  # a read-only database still serves reads; the hourly roll tries again
        logging.getLogger(__name__).exception("partition roll at start failed")
    sessions = build_sessionmaker(engine)
    read_sessions = build_sessionmaker(engine, read_only=True)
    runner = JobRunner(
        sessions, {rehearsal_jobs.KIND: rehearsal_jobs.run}, lease_s=settings.job_lease_s
    )

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        tuning: Tuning = app.state.tuning
        unjudged = await run_in_threadpool(_unjudged, sessions)
        if tuning.waiting is not None:
            for rail_id in unjudged:  # stored before a restart and never judged: due now
                tuning.waiting.mark(rail_id, -math.inf)
        keepers = [
            asyncio.create_task(_retention_loop(settings, sessions)),
            asyncio.create_task(_partition_loop(settings, engine)),
            asyncio.create_task(_settle_loop(app.state.group_commit, tuning)),
        ]
        yield
        for keeper in keepers:
            keeper.cancel()
        if tuning.waiting is not None:  # nothing left waiting: judged before the stop
            await app.state.group_commit.settle(tuning.waiting.due(math.inf, 0.0))
        await run_in_threadpool(close, app)

    app = FastAPI(
        title="phaseward",
        version=__version__,
        summary="Keeps watch over multiphase power rails that can lose a phase and keep running.",
        lifespan=lifespan,
        docs_url=None,  # served from the package itself by routes/docs.py, no outside network
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.clock = clock
    app.state.engine = engine
    app.state.sessions = sessions
    app.state.read_sessions = read_sessions
    app.state.jobs = runner
    tolerances = Tolerances(
        grid_s=settings.assess_grid_s, load=settings.assess_load_tolerance,
        temp_k=settings.assess_temp_tolerance_k, vout=settings.assess_vout_tolerance,
        weight=settings.assess_weight_tolerance,
    )  # fmt: skip
    app.state.live_states = LiveStates(settings.rail_cache_size)
    app.state.tuning = tuning = Tuning(
        tolerances=tolerances, checkpoint_samples=settings.state_checkpoint_samples,
        live=app.state.live_states, judge_within_s=settings.judge_within_s, waiting=Waiting(),
        ahead=Ahead(), monitor_pass=JudgeApart(settings.rail_cache_size, settings.blas_threads)
        if settings.judge_apart else None,
    )  # fmt: skip
    app.state.group_commit = GroupCommit(sessions, settings.max_batch_samples, tuning=tuning)
    rail_model.resize_cache(settings.rail_cache_size)
    app.state.rate_limiter = RateLimiter(settings.rate_per_s, settings.rate_burst)
    runner.resume()  # jobs whose server stopped run again here; leases renewed from now on
    app.state.metrics = observability.Metrics()
    errors.install(app)
    app.add_middleware(Gate, settings=settings, state=app.state)
    app.add_middleware(errors.CatchAll)  # inside the request log, which then counts the 500
    observability.install(app)
    app.include_router(observability.router)
    app.include_router(rails.router)
    app.include_router(samples.router)
    app.router.routes.insert(0, samples.LANE)  # before the route it stands in for
    app.include_router(stream.router)
    app.include_router(events.router)
    app.include_router(captures.router)
    app.include_router(analyses.router)
    app.include_router(analyses.tools)
    app.include_router(traces.router)
    app.include_router(rehearsals.router)
    app.include_router(web.router)
    app.include_router(docs.router)
    _complete_openapi(app)

    return app


def _complete_openapi(app: FastAPI) -> None:
    """Add the models that hand-written request schemas refer to (the samples body, read
    without a pydantic parameter) to the generated document's components, then describe
    every field (see api/schemas/glossary.py)."""
    generate = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            document = generate()
            schemas = document.setdefault("components", {}).setdefault("schemas", {})
            for name, schema in BODY_COMPONENTS.items():
                schemas.setdefault(name, schema)
            app.openapi_schema = describe(document)
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]


def close(app: FastAPI) -> None:
    """Stop the jobs and close the database pool once running requests have let go of it.

    A running job stops at its next progress report, unfinished: jobs are stored and run
    again on the next start."""
    app.state.jobs.shutdown()
    if isinstance(app.state.tuning.monitor_pass, JudgeApart):
        app.state.tuning.monitor_pass.close()
    close_engine(app.state.engine)
