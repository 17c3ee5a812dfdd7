"""The batching senders post columnar bodies; what they store is what objects store."""

from __future__ import annotations

import asyncio
from typing import Any

import httpx
import pytest

from phaseward_client import (
    AsyncBatchingSender,
    AsyncClient,
    BatchingSender,
    Client,
    PhasewardError,
    SendFailed,
)
from phaseward_client.columns import COLUMNS_JSON, to_columns
from support import new_rail_id, rail_definition, sample

T = 1.8e9


def mixed(k: int) -> dict[str, Any]:
    """A sample with a phase left out on odd seqs, one current as a sense voltage, a flag."""
    body = sample(k, [20.0, 20.0, 20.0, 20.0], at=T + k)
    body["phases"][2] = {"index": 2, "sense_v": 0.003, "temp_c": 61.5}
    if k % 2:
        del body["phases"][3]
    if k == 4:
        body["phases"][1]["overcurrent"] = True
    return body


class Recording(httpx.HTTPTransport):
    def __init__(self) -> None:
        super().__init__()
        self.content_types: list[str] = []

    def handle_request(self, request: httpx.Request) -> httpx.Response:
        if request.method == "POST":
            self.content_types.append(request.headers.get("content-type", ""))
        return super().handle_request(request)


def window(client: Client, rail_id: str) -> dict[str, Any]:
    got = client.get_samples(rail_id, since=0, until=1e10, limit=1000)
    return {"seq": got.seq, "current_a": got.current_a, "temp_c": got.temp_c, "flags": got.flags}


def test_the_sender_posts_columns_that_store_as_objects_do(
    service_url: str, client: Client
) -> None:
    by_columns, by_objects = new_rail_id(), new_rail_id()
    for rid in (by_columns, by_objects):
        client.create_rail(rail_definition(rid))
    transport = Recording()
    with (
        Client(service_url, transport=transport) as recorded,
        BatchingSender(recorded, by_columns, batch_size=4, max_delay_s=60) as sender,
    ):
        for k in range(10):
            sender.add(mixed(k))
    client.post_samples(by_objects, [mixed(k) for k in range(10)])
    assert transport.content_types == [COLUMNS_JSON] * 3
    assert window(client, by_columns) == window(client, by_objects)
    assert client.status(by_columns).condition == client.status(by_objects).condition


def test_the_async_sender_posts_columns(service_url: str, client: Client) -> None:
    rid = new_rail_id()
    client.create_rail(rail_definition(rid))

    async def scenario() -> tuple[int, int]:
        async with AsyncClient(service_url) as aclient:
            async with AsyncBatchingSender(aclient, rid, batch_size=5, max_delay_s=60) as sender:
                for k in range(10):
                    await sender.add(mixed(k))
            return sender.stats.stored, sender.stats.batches

    assert asyncio.run(scenario()) == (10, 2)
    assert window(client, rid)["seq"] == list(range(10))


def test_a_batch_that_does_not_fit_columns_goes_as_objects(client: Client, rail_id: str) -> None:
    """A phase twice in one sample has no columnar form: the objects go, and the service
    names the reading."""
    twice = sample(0, [20.0, 20.0], at=T)
    twice["phases"][1]["index"] = 0
    assert to_columns([twice]) is None
    assert to_columns([sample(0, [20.0], at=T) | {"phases": [{"index": 0}]}]) is None
    sender = BatchingSender(client, rail_id, batch_size=1)
    sender.add(twice)
    with pytest.raises(SendFailed) as failed:
        sender.close()
    assert isinstance(failed.value.cause, PhasewardError)
    assert failed.value.cause.field == "[0].phases[1].index"


def test_columns_fill_what_a_sample_leaves_out_with_null() -> None:
    body = to_columns([mixed(0), mixed(1)])
    assert body is not None
    assert body["seq"] == [0, 1]
    assert body["phases"]["index"] == [0, 1, 2, 3]
    assert body["phases"]["current_a"] == [[20.0, 20.0, None, 20.0], [20.0, 20.0, None, None]]
    assert body["phases"]["sense_v"] == [[None, None, 0.003, None], [None, None, 0.003, None]]
