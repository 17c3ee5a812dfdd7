"""Batching senders against the real service; failures are injected by a transport in front
of it (refusals, refused connections, lost answers, a stalled service)."""

from __future__ import annotations

import asyncio
import threading
import time

import httpx
import pytest

from phaseward_client import (
    AsyncBatchingSender,
    AsyncClient,
    BatchingSender,
    BufferFull,
    Client,
    PhaseReading,
    RetryPolicy,
    Sample,
    SendFailed,
)
from support import (
    AsyncScriptedTransport,
    Script,
    ScriptedTransport,
    free_port,
    new_rail_id,
    rail_definition,
    sample,
    wait_until,
)

EVEN = [20.0, 20.0, 20.0, 20.0]
FAST = RetryPolicy(base_delay_s=0.01, max_delay_s=0.05)


def stored_seqs(client: Client, rail_id: str) -> list[int]:
    return client.get_samples(rail_id, since=0, until=1e10, limit=1000).seq


def scripted(service_url: str, script: Script) -> Client:
    return Client(service_url, transport=ScriptedTransport(script))


def test_flushes_by_count_without_waiting(client: Client, rail_id: str) -> None:
    with BatchingSender(client, rail_id, batch_size=5, max_delay_s=60, first_seq=0) as sender:
        for k in range(10):
            sender.add(sample(None, EVEN, at=1.8e9 + k))
        wait_until(lambda: sender.stats.batches == 2, timeout_s=5)
        assert stored_seqs(client, rail_id) == list(range(10))
        assert sender.pending == 0


def test_flushes_by_time(client: Client, rail_id: str) -> None:
    with BatchingSender(client, rail_id, batch_size=100, max_delay_s=0.3) as sender:
        start = time.monotonic()
        for k in range(3):
            sender.add(sample(None, EVEN, at=1.8e9 + k))
        wait_until(lambda: sender.stats.batches == 1, timeout_s=5)
        waited = time.monotonic() - start
        assert 0.25 <= waited < 3.0
        assert sender.stats.stored == 3
        assert len(stored_seqs(client, rail_id)) == 3


def test_assigns_seq_and_keeps_the_callers(client: Client, rail_id: str) -> None:
    with BatchingSender(client, rail_id, first_seq=1000, max_delay_s=60) as sender:
        assert sender.add(sample(None, EVEN, at=1.8e9)) == 1000
        assert sender.add(sample(None, EVEN, at=1.8e9 + 1)) == 1001
        assert sender.add(sample(5000, EVEN, at=1.8e9 + 2)) == 5000
        typed = Sample(1.8e9 + 3, 12.0, 1.0, [PhaseReading(i, current_a=20.0) for i in range(4)])
        assert sender.add(typed) == 5001
    assert stored_seqs(client, rail_id) == [1000, 1001, 5000, 5001]


def test_default_first_seq_is_the_clock_in_microseconds(client: Client, rail_id: str) -> None:
    before = time.time_ns() // 1000
    with BatchingSender(client, rail_id) as sender:
        seq = sender.add(sample(None, EVEN))
    assert before <= seq <= time.time_ns() // 1000


def test_close_on_exit_flushes(client: Client, rail_id: str) -> None:
    with BatchingSender(client, rail_id, batch_size=100, max_delay_s=60) as sender:
        for k in range(7):
            sender.add(sample(k, EVEN))
        assert stored_seqs(client, rail_id) == []
    assert stored_seqs(client, rail_id) == list(range(7))
    with pytest.raises(RuntimeError, match="closed"):
        sender.add(sample(8, EVEN))


def test_retries_refusals_and_refused_connections(service_url: str, rail_id: str) -> None:
    script = Script((503, "0.2"), (429, None), "connect", "pass")
    with scripted(service_url, script) as flaky:
        sender = BatchingSender(flaky, rail_id, batch_size=4, retry=FAST, seed=1)
        start = time.monotonic()
        for k in range(4):
            sender.add(sample(k, EVEN))
        sender.close()
    assert time.monotonic() - start >= 0.2  # Retry-After honoured
    assert sender.stats.retries == 3
    assert sender.stats.retry_delays_s[0] >= 0.2
    assert sender.stats.stored == 4
    assert script.seen[:4] == [(503, "0.2"), (429, None), "connect", "pass"]
    with Client(service_url) as plain:
        assert stored_seqs(plain, rail_id) == [0, 1, 2, 3]


def test_a_lost_answer_is_resent_and_absorbed(service_url: str, rail_id: str) -> None:
    script = Script("lose")
    with scripted(service_url, script) as flaky:
        with BatchingSender(flaky, rail_id, batch_size=3, retry=FAST) as sender:
            for k in range(3):
                sender.add(sample(k, EVEN))
        assert (sender.stats.retries, sender.stats.stored, sender.stats.duplicates) == (1, 0, 3)
        assert stored_seqs(flaky, rail_id) == [0, 1, 2]


def test_a_4xx_is_not_retried_and_is_surfaced(client: Client, rail_id: str) -> None:
    sender = BatchingSender(client, rail_id, batch_size=2, retry=FAST)
    bad = sample(0, EVEN)
    bad["phases"][0]["temp_c"] = -500.0
    sender.add(bad)
    sender.add(sample(1, EVEN))
    with pytest.raises(SendFailed) as failed:
        sender.flush()
    assert failed.value.status == 422
    assert [s["seq"] for s in failed.value.samples] == [0, 1]
    assert sender.stats.retries == 0
    sender.add(sample(2, EVEN))  # later batches still go out
    sender.add(sample(3, EVEN))
    sender.close()
    assert stored_seqs(client, rail_id) == [2, 3]
    assert len(sender.failures) == 1


def test_an_unknown_rail_surfaces_404_on_close(client: Client) -> None:
    sender = BatchingSender(client, new_rail_id("missing"), max_delay_s=60, retry=FAST)
    sender.add(sample(0, EVEN))
    with pytest.raises(SendFailed) as failed:
        sender.close()
    assert failed.value.status == 404
    assert isinstance(failed.value.cause, Exception)


def test_retries_run_out_against_a_dead_port() -> None:
    with Client(f"http://127.0.0.1:{free_port()}", timeout_s=1) as dead:
        sender = BatchingSender(
            dead, "nowhere", retry=RetryPolicy(max_attempts=3, base_delay_s=0.01)
        )
        sender.add(sample(0, EVEN))
        with pytest.raises(SendFailed) as failed:
            sender.close()
    assert isinstance(failed.value.cause, httpx.ConnectError)
    assert failed.value.status is None
    assert sender.stats.retries == 2


def test_a_full_buffer_raises_after_its_timeout(service_url: str, rail_id: str) -> None:
    script = Script("block")
    with scripted(service_url, script) as slow:
        sender = BatchingSender(
            slow, rail_id, batch_size=5, max_buffer=5, full_timeout_s=0.2, max_delay_s=0.01
        )
        for k in range(5):
            sender.add(sample(k, EVEN))
        wait_until(lambda: sender.pending == 5 and not sender._pending)  # in flight, blocked
        for k in range(5, 10):
            sender.add(sample(k, EVEN))  # the buffer holds five more
        start = time.monotonic()
        with pytest.raises(BufferFull):
            sender.add(sample(10, EVEN))
        assert time.monotonic() - start >= 0.19
        script.release.set()
        sender.close()
    with Client(service_url) as plain:
        assert stored_seqs(plain, rail_id) == list(range(10))


def test_a_full_buffer_blocks_until_there_is_room(service_url: str, rail_id: str) -> None:
    script = Script("block")
    with scripted(service_url, script) as slow:
        sender = BatchingSender(
            slow, rail_id, batch_size=2, max_buffer=2, full_timeout_s=None, max_delay_s=0.01
        )
        for k in range(2):
            sender.add(sample(k, EVEN))
        wait_until(lambda: not sender._pending)
        sender.add(sample(2, EVEN))
        sender.add(sample(3, EVEN))
        threading.Timer(0.3, script.release.set).start()
        start = time.monotonic()
        sender.add(sample(4, EVEN))  # blocks until the stalled batch is answered
        assert time.monotonic() - start >= 0.25
        sender.close()
    with Client(service_url) as plain:
        assert stored_seqs(plain, rail_id) == [0, 1, 2, 3, 4]


def test_bad_samples_fail_in_add_not_later(client: Client, rail_id: str) -> None:
    with BatchingSender(client, rail_id) as sender:
        with pytest.raises(ValueError, match="finite"):
            sender.add(Sample(1.8e9, float("nan"), 1.0, [PhaseReading(0, current_a=1.0)]))
        with pytest.raises(TypeError, match="seq must be an integer"):
            sender.add({**sample(0, EVEN), "seq": "7"})
    assert sender.stats.added == 0


def test_sender_settings_are_checked(client: Client) -> None:
    with pytest.raises(ValueError, match="max_buffer"):
        BatchingSender(client, "r", batch_size=10, max_buffer=5)
    with pytest.raises(ValueError, match="first_seq"):
        BatchingSender(client, "r", first_seq=-1)


# --- the async sender --------------------------------------------------------------------


def test_async_sender_count_time_close(service_url: str) -> None:
    async def scenario() -> list[int]:
        async with AsyncClient(service_url) as client:
            rid = new_rail_id("a")
            await client.create_rail(rail_definition(rid))
            async with AsyncBatchingSender(
                client, rid, batch_size=4, max_delay_s=0.3, first_seq=0
            ) as sender:
                for k in range(4):
                    await sender.add(sample(None, EVEN, at=1.8e9 + k))
                for _ in range(500):  # by count: no waiting for max_delay_s
                    if sender.stats.batches == 1:
                        break
                    await asyncio.sleep(0.01)
                assert sender.stats.batches == 1
                start = time.monotonic()
                await sender.add(sample(None, EVEN, at=1.8e9 + 4))
                while sender.stats.batches < 2:  # by time
                    await asyncio.sleep(0.01)
                assert time.monotonic() - start >= 0.25
                for k in range(5, 8):
                    await sender.add(sample(None, EVEN, at=1.8e9 + k))
            window = await client.get_samples(rid, since=0, until=1e10)  # closed: flushed
            return window.seq

    assert asyncio.run(scenario()) == list(range(8))


def test_async_sender_retries_and_surfaces_4xx(service_url: str, rail_id: str) -> None:
    script = Script((503, "0.1"), "connect", "lose")

    async def scenario() -> AsyncBatchingSender:
        transport = AsyncScriptedTransport(script)
        async with AsyncClient(service_url, transport=transport) as client:
            sender = AsyncBatchingSender(client, rail_id, batch_size=3, retry=FAST, seed=2)
            for k in range(3):
                await sender.add(sample(k, EVEN))
            await sender.flush()
            assert sender.stats.retries == 3
            assert sender.stats.duplicates == 3  # the lost answer's batch was stored
            await sender.add(sample(3, EVEN))
            bad = sample(4, EVEN)
            bad["vin_v"] = -1.0
            await sender.add(bad)
            with pytest.raises(SendFailed) as failed:
                await sender.aclose()
            assert failed.value.status == 422
            return sender

    sender = asyncio.run(scenario())
    assert sender.stats.retry_delays_s[0] >= 0.1
    with Client(service_url) as plain:
        assert stored_seqs(plain, rail_id) == [0, 1, 2]


def test_async_full_buffer(service_url: str, rail_id: str) -> None:
    script = Script("block")

    async def scenario() -> None:
        transport = AsyncScriptedTransport(script)
        async with AsyncClient(service_url, transport=transport) as client:
            sender = AsyncBatchingSender(
                client, rail_id, batch_size=2, max_buffer=2, full_timeout_s=0.2, max_delay_s=0.01
            )
            for k in range(2):
                await sender.add(sample(k, EVEN))
            while sender._pending:
                await asyncio.sleep(0.01)
            for k in range(2, 4):
                await sender.add(sample(k, EVEN))
            with pytest.raises(BufferFull):
                await sender.add(sample(4, EVEN))
            script.release.set()
            await sender.add(sample(4, EVEN))  # waits for room, then fits
            await sender.aclose()

    asyncio.run(scenario())
    with Client(service_url) as plain:
        assert stored_seqs(plain, rail_id) == [0, 1, 2, 3, 4]
