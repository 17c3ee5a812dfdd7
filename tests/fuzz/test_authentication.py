"""Authentication is not ignored: with keys required, every operation of the OpenAPI document
answers 401 to a request without a key, except what the README names as open: the health
and readiness probes, the OpenAPI document and its viewers, and the page's static files (none
carries rail data)."""

from __future__ import annotations

import re
from pathlib import Path

import httpx
import pytest

from phaseward.api.app import close, create_app
from phaseward.settings import Settings

pytestmark = pytest.mark.anyio
OPEN_PATHS = {"/healthz", "/readyz", "/", "/rails/{rail_id}", "/static/{name}"}
OPEN_DOCS = {"/openapi.json", "/docs", "/redoc"}  # served outside the document itself


async def test_every_operation_needs_a_key(tmp_path: Path, database_url: str) -> None:
    settings = Settings(data_dir=tmp_path, database_url=database_url, auth_mode="keys",
                        auth_failure_burst=1000, future_skew_s=1e8)  # fmt: skip
    app = create_app(settings)
    schema = app.openapi()
    checked = 0
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as c:
        for path, operations in schema["paths"].items():
            if path in OPEN_PATHS:
                continue
            url = re.sub(r"\{[^}]+\}", "1", path)
            for method in operations:
                answer = await c.request(method.upper(), url, json={})
                assert answer.status_code == 401, (method, path, answer.status_code)
                checked += 1
        for path in (OPEN_PATHS & {"/healthz", "/readyz", "/"}) | OPEN_DOCS:
            assert (await c.get(path)).status_code == 200, path
        assert (await c.get("/metrics")).status_code == 401
    close(app)
    assert checked >= 25  # every data operation of the service was tried
