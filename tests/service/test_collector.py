"""The garbage collector's schedule in a serving process (``phaseward.collector``): a fleet's
churn of long-lived documents must not set off full collections every few seconds."""

from __future__ import annotations

import gc
from collections.abc import Iterator
from typing import Any

import pytest

from phaseward import cli
from phaseward.api import observability
from phaseward.api.app import close
from phaseward.collector import FULL_COLLECTION_EVERY, quiet_collector
from phaseward.settings import Settings

ROUNDS, DOCUMENTS = 10, 20_000


@pytest.fixture
def collector_restored() -> Iterator[None]:
    threshold = gc.get_threshold()
    yield
    gc.set_threshold(*threshold)
    gc.unfreeze()


def _full_collections_over_churn() -> int:
    """Full collections while a table of small acyclic documents (a live state per rail) is
    written anew each round and the old one dropped: every document lives through several
    young collections, reaches the oldest generation and is then freed by reference counting."""
    full = 0

    def count(phase: str, info: dict[str, Any]) -> None:
        nonlocal full
        full += phase == "stop" and info["generation"] == 2

    # Whatever the test session holds is frozen out, as a server's start-up heap is; the
    # second collection resets the size of the oldest generation the collector goes by.
    gc.collect()
    gc.freeze()
    gc.collect()
    gc.callbacks.append(count)
    try:
        table: list[dict[str, Any]] = []
        for r in range(ROUNDS):
            table = [{"nodes_c": [float(r), 1.0], "phases": [[i]]} for i in range(DOCUMENTS)]
        assert len(table) == DOCUMENTS
    finally:
        gc.callbacks.remove(count)
    return full


@pytest.mark.usefixtures("collector_restored")
def test_full_collections_are_rare_under_churn() -> None:
    gc.set_threshold(700, 10, 10)  # CPython's defaults (from memory; the documented ones)
    by_default = _full_collections_over_churn()
    quiet_collector()
    quiet = _full_collections_over_churn()
    # The churn holds some 80,000 containers a round: by default a full pass runs every round
    # or so; with the schedule none runs (the rounds make about 100 gen-1 passes in all).
    assert by_default >= ROUNDS // 3, by_default
    assert quiet == 0, quiet
    assert gc.get_threshold()[2] == FULL_COLLECTION_EVERY


@pytest.mark.usefixtures("collector_restored")
def test_the_server_keeps_the_schedule(settings: Settings, monkeypatch: pytest.MonkeyPatch) -> None:
    # The server's log set-up would replace the test session's log handlers.
    monkeypatch.setattr(observability, "configure_logging", lambda level: None)
    gc.set_threshold(700, 10, 10)
    server = cli._server(settings)
    close(server.config.app)  # its jobs and database pool; uvicorn never ran it
    assert gc.get_threshold() == (700, 10, FULL_COLLECTION_EVERY)
    assert gc.get_freeze_count() > 0  # the start-up heap frozen out of full collections
