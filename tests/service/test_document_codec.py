"""The JSON of document columns (live states, events' details, definitions) written by orjson
and read back: what the monitor stored is what it reads, on either database."""

from __future__ import annotations

import json
import math
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st
from tests.factories import rail_spec

from phaseward.api.schemas.rails import RailCreate
from phaseward.monitor import rails as rail_service
from phaseward.settings import Settings
from phaseward.store import state
from phaseward.store.db import build_engine, build_sessionmaker, dumps, loads, migrate, transaction

scalars = (
    st.none() | st.booleans() | st.integers(-(2**63), 2**63 - 1) | st.text(max_size=8)
    | st.floats(allow_nan=False, allow_infinity=False)
)  # fmt: skip
documents = st.recursive(
    scalars,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner),
    max_leaves=20,
)


@settings(max_examples=300, deadline=None)
@given(doc=documents)
def test_documents_read_back_as_the_standard_library_reads_them(doc: Any) -> None:
    # Reference: Python's json module, which wrote these columns before (the same values back,
    # every float to its last bit: both print the shortest repr that round-trips).
    assert loads(dumps(doc)) == json.loads(json.dumps(doc))


def test_what_the_standard_library_alone_writes_or_reads_still_goes_through() -> None:
    huge = {"stamp": 2**70}  # beyond 64 bits: orjson refuses, the standard library writes it
    assert loads(dumps(huge)) == huge
    old = loads('{"x": NaN}')  # an older SQLite database may hold the standard library's NaN
    assert math.isnan(old["x"])
    assert loads(dumps({"x": math.nan})) == {"x": None}  # written now: null (no NaN in JSON)


def test_a_live_state_document_round_trips_through_the_database(settings: Settings) -> None:
    engine = build_engine(settings)
    migrate(engine)
    sessions = build_sessionmaker(engine)
    doc = {
        "nodes_c": [25.000000000000004, 61.23456789012345, 1e-300],
        "phases": [{"condition": "active", "current_a": 20.1, "temp_c": None, "flags": 0}],
        "assessed": {"seq": 2**62, "t_s": 1.8e9 + 0.125},
    }
    try:
        spec = RailCreate.model_validate(rail_spec(id="codec")).stored()
        rail_service.create(sessions, "codec", spec)
        with transaction(sessions) as session:
            state.put(
                session, rail_id="codec", version=1, last_seq=0, last_t_s=1.8e9, state=doc,
                now_s=0.0, stamp=2**62, replay=[[0]],
            )  # fmt: skip
        with transaction(sessions) as session:
            row = state.get(session, "codec")
        assert row is not None
        assert row.state == doc
        assert row.replay == [[0]]
    finally:
        engine.dispose()
