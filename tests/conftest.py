"""Fixtures shared by every test: a fresh database per test and the app over ASGI."""

from __future__ import annotations

import os
import uuid
from collections.abc import AsyncIterator, Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from hypothesis import settings as hypothesis_settings
from sqlalchemy import create_engine, text
from sqlalchemy.engine import make_url

from phaseward.api.app import close, create_app
from phaseward.settings import Settings

# Generated examples are the same on every run: a failure reproduces, and CI judges the tree,
# not the luck of a draw (the examples still cover what the strategies describe). No deadline
# per example: on a shared machine a 200 ms limit fails correct code (speed is measured in
# bench/, not in tests).
hypothesis_settings.register_profile("phaseward", derandomize=True, deadline=None)
hypothesis_settings.load_profile("phaseward")


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"


@pytest.fixture
def database_url(tmp_path: Path) -> Iterator[str]:
    """A fresh database per test: a SQLite file, or with PHASEWARD_TEST_DATABASE_URL set, a
    PostgreSQL schema of its own that is dropped afterwards."""
    server = os.environ.get("PHASEWARD_TEST_DATABASE_URL")
    if not server:
        yield f"sqlite:///{(tmp_path / 'phaseward.db').as_posix()}"
        return
    schema = f"t_{uuid.uuid4().hex[:16]}"
    admin = create_engine(server, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f"CREATE SCHEMA {schema}"))
    url = make_url(server).update_query_dict({"options": f"-csearch_path={schema}"})
    yield url.render_as_string(hide_password=False)
    with admin.connect() as conn:
        conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
    admin.dispose()


MakeSettings = Callable[..., Settings]


@pytest.fixture
def make_settings(tmp_path: Path, database_url: str) -> MakeSettings:
    """Settings for a test's own app: its data directory and database, open access unless
    overridden, and a clock policy that accepts the invented test data (dated 2027)."""

    def make(**overrides: Any) -> Settings:
        fields: dict[str, Any] = {"data_dir": tmp_path, "database_url": database_url,
                                  "auth_mode": "open", "future_skew_s": 1e8}  # fmt: skip
        return Settings(**(fields | overrides))

    return make


@pytest.fixture
def settings(make_settings: MakeSettings) -> Settings:
    return make_settings(max_body_bytes=64 * 1024, max_batch_samples=50)


@pytest.fixture
def app(settings: Settings) -> FastAPI:
    return create_app(settings)


@pytest.fixture
async def client(app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        yield c
    close(app)
