"""The async client against the real service (driven with asyncio.run, no plugin needed)."""

from __future__ import annotations

import asyncio

import httpx
import pytest

from phaseward_client import AsyncClient, Load, PhasewardError
from support import free_port, new_rail_id, open_phase_csv, rail_definition, sample


def test_async_round_trip(service_url: str) -> None:
    async def scenario() -> None:
        async with AsyncClient(service_url) as client:
            assert (await client.health())["status"] == "ok"
            rid = new_rail_id("a")
            rail = await client.create_rail(rail_definition(rid))
            assert rail.version == 1
            assert rid in [r.id async for r in client.iter_rails(page_size=1)]
            with pytest.raises(PhasewardError) as taken:
                await client.create_rail(rail_definition(rid))
            assert taken.value.status == 409

            first = await client.post_sample(rid, sample(0, [20.0] * 4))
            assert first.stored == 1
            more = await client.post_samples(rid, [sample(k, [20.0] * 4) for k in (1, 2)])
            assert more.stored == 2
            tripped = await client.post_sample(rid, sample(3, [26.0, 0.0, 26.0, 26.0], tripped=1))
            assert tripped.condition == "degraded"

            window = await client.get_samples(rid, since=0, until=1e10)
            assert window.seq == [0, 1, 2, 3]
            status = await client.status(rid)
            assert status.phases[1].condition == "isolated"

            newest_first = [e async for e in client.iter_events(rid, page_size=2)]
            assert [e.kind for e in reversed(newest_first)] == [
                "rail.condition", "phase.isolated", "rail.condition", "capacity.exposed",
            ]  # fmt: skip
            acked = await client.ack_event(newest_first[1].id, by="async operator")
            assert acked.acked_by == "async operator"

            screening = await client.screening(rid)
            assert len(screening.cases) == 3  # one phase is out already
            forecast = await client.forecast(rid, load=Load.constant(70.0), points=10)
            assert len(forecast.junction_c) == 10

            await client.put_rail(rid, rail_definition(rid, load_a=70.0))
            assert (await client.get_rail(rid)).version == 2
            await client.delete_rail(rid)
            with pytest.raises(PhasewardError) as gone:
                await client.status(rid)
            assert gone.value.error == "not_found"

    asyncio.run(scenario())


def test_async_transport_errors_pass_through() -> None:
    async def scenario() -> None:
        async with AsyncClient(f"http://127.0.0.1:{free_port()}", timeout_s=2) as dead:
            await dead.health()

    with pytest.raises(httpx.ConnectError):
        asyncio.run(scenario())


def test_async_capture_upload(service_url: str) -> None:
    async def scenario() -> None:
        async with AsyncClient(service_url) as client:
            rid = new_rail_id("c")
            await client.create_rail(rail_definition(rid))
            await client.post_samples(rid, [sample(k, [20.0] * 4) for k in range(3)])
            await client.post_sample(rid, sample(3, [80 / 3, 0.0, 80 / 3, 80 / 3], tripped=1))
            (event,) = (await client.list_events(rid, kind=["phase.isolated"])).items
            answer = await client.upload_capture(rid, event.id, open_phase_csv())
            assert answer["signature"]["kind"] == "open_phase"
            assert answer["phase"] == 1

    asyncio.run(scenario())
