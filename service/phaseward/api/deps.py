"""Dependencies as ``Annotated`` aliases; everything comes from ``app.state``.

Those that only look something up are ``async``: FastAPI runs a plain ``def`` dependency in
its thread pool, a hand-off per dependency per request that cost more than the look-up."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session, sessionmaker

from phaseward.settings import Settings


async def _settings(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


Clock = Callable[[], float]  # epoch seconds now; time.time in service, a fixed one in tests


async def _clock(request: Request) -> Clock:
    clock: Clock = request.app.state.clock
    return clock


async def _sessions(request: Request) -> sessionmaker[Session]:
    sessions: sessionmaker[Session] = request.app.state.sessions
    return sessions


async def _read_sessions(request: Request) -> sessionmaker[Session]:
    sessions: sessionmaker[Session] = request.app.state.read_sessions
    return sessions


def _read_session(
    sessions: Annotated[sessionmaker[Session], Depends(_read_sessions)],
) -> Iterator[Session]:
    """A session for reads; it never writes (writes go through monitor services), so it takes
    no write lock."""
    with sessions() as session, session.begin():
        yield session


SettingsDep = Annotated[Settings, Depends(_settings)]
ClockDep = Annotated[Clock, Depends(_clock)]
SessionsDep = Annotated[sessionmaker[Session], Depends(_sessions)]
ReadSessionsDep = Annotated[sessionmaker[Session], Depends(_read_sessions)]
ReadSessionDep = Annotated[Session, Depends(_read_session)]
