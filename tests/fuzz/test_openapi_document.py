"""Issue 17 item 13: the published OpenAPI document is valid (openapi-spec-validator), every
reference in it resolves, and the statuses the service answers are documented."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import httpx
import pytest
from fastapi import FastAPI
from openapi_spec_validator import validate
from tests.factories import SMALL_RAIL

pytestmark = pytest.mark.anyio


def refs(node: Any) -> Iterator[str]:
    if isinstance(node, dict):
        for key, value in node.items():
            if key == "$ref" and isinstance(value, str):
                yield value
            else:
                yield from refs(value)
    elif isinstance(node, list):
        for item in node:
            yield from refs(item)


def resolve(document: dict[str, Any], ref: str) -> Any:
    assert ref.startswith("#/"), ref
    node: Any = document
    for part in ref[2:].split("/"):
        node = node[part.replace("~1", "/").replace("~0", "~")]
    return node


async def test_the_document_validates_and_every_reference_resolves(
    client: httpx.AsyncClient,
) -> None:
    document = (await client.get("/openapi.json")).json()
    validate(document)  # OpenAPI 3.1 (raises on an invalid document)
    found = set(refs(document))
    assert "#/components/schemas/PhaseReading" in found  # the samples body's own models
    for ref in found:
        resolve(document, ref)  # KeyError if it does not resolve


async def test_statuses_the_service_answers_are_documented(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    paths = app.openapi()["paths"]
    created = await client.put("/v1/rails/fresh", json={k: v for k, v in SMALL_RAIL.items()
                                                         if k != "id"})  # fmt: skip
    assert created.status_code == 201
    assert "201" in paths["/v1/rails/{rail_id}"]["put"]["responses"]
    assert {"401", "403", "429"} <= set(paths["/metrics"]["get"]["responses"])


@pytest.mark.parametrize("value", ["nan", "NaN", "inf", "-inf", "1e999"])
async def test_times_that_are_not_finite_are_refused(client: httpx.AsyncClient, value: str) -> None:
    for name in ("since", "until"):
        answer = await client.get("/v1/events", params={name: value})
        assert answer.status_code == 422, (name, value, answer.text)
        assert answer.json()["field"] == name
