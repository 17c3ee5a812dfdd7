"""Authentication is not ignored: with keys required, every operation of the OpenAPI document
answers 401 to a request without a key, except what the README names as open: the health
and readiness probes, the OpenAPI document and its viewers, and the page's static files (none
carries rail data)."""

from __future__ import annotations

import re

import httpx
import pytest
from tests.conftest import MakeSettings

from phaseward.api.app import close, create_app

pytestmark = pytest.mark.anyio
OPEN_PATHS = {"/healthz", "/readyz", "/", "/rails/{rail_id}", "/static/{name}"}
# Served outside the document itself.
OPEN_DOCS = {"/openapi.json", "/docs", "/docs-assets/swagger-ui.css"}


async def test_every_operation_needs_a_key(make_settings: MakeSettings) -> None:
    app = create_app(make_settings(auth_mode="keys", auth_failure_burst=1000))
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
