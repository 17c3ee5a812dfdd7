"""PostgreSQL time partitions of samples: the migration converts a table holding rows (and
back), a sample dated where no partition exists is stored, rolling moves it into a partition
of its own, seq duplicates and conflicts are caught across partitions, a history read scans
only its partitions, and retention drops a whole partition with the same summaries."""

from __future__ import annotations

import time
from typing import Any

import httpx
import pytest
from alembic import command
from alembic.config import Config
from fastapi import FastAPI
from sqlalchemy import Connection, create_engine, event, text
from tests.factories import SMALL_RAIL, sample

from phaseward.api.app import roll_partitions
from phaseward.monitor import retention
from phaseward.settings import Settings
from phaseward.store import partitions
from phaseward.store.db import MIGRATIONS_DIR

pytestmark = pytest.mark.anyio
DAY = 86400.0
EVEN = [20.0] * 4


@pytest.fixture(autouse=True)
def _postgres_only(database_url: str) -> None:
    if database_url.startswith("sqlite"):
        pytest.skip("partitions are PostgreSQL's (set PHASEWARD_TEST_DATABASE_URL)")


def _upgrade(conn: Connection, revision: str, *, down: bool = False) -> None:
    cfg = Config()
    cfg.set_main_option("script_location", str(MIGRATIONS_DIR))
    cfg.attributes["connection"] = conn
    (command.downgrade if down else command.upgrade)(cfg, revision)


def _where(conn: Connection) -> dict[str, int]:
    """Rows per partition of samples."""
    rows = conn.execute(text("SELECT tableoid::regclass::text, count(*) FROM samples GROUP BY 1"))
    return {str(name).rsplit(".", 1)[-1]: int(n) for name, n in rows}


def test_migration_converts_a_table_with_rows_and_back(database_url: str) -> None:
    engine = create_engine(database_url)
    days = [1.80e9, 1.80e9 + 0.5 * DAY, 1.80e9 + 2 * DAY]  # two days, one of them twice
    with engine.begin() as conn:
        _upgrade(conn, "0007_trace_isolated_mask")
        conn.execute(text("INSERT INTO rails VALUES ('r1', 1, 0, 0)"))
        conn.execute(text("INSERT INTO rail_versions VALUES ('r1', 1, '{}', 0)"))
        for seq, t in enumerate(days):
            conn.execute(
                text(
                    "INSERT INTO samples (rail_id, seq, t_s, version, vin_v, vout_v, current_a, "
                    "temp_c, flags) VALUES ('r1', :seq, :t, 1, 12, 1, 'a', 'b', 'c')"
                ),
                {"seq": seq, "t": t},
            )
        before = conn.execute(text("SELECT * FROM samples ORDER BY seq")).all()
        _upgrade(conn, "head")
        assert partitions.is_partitioned(conn)
        assert conn.execute(text("SELECT * FROM samples ORDER BY seq")).all() == before
        # 1.8e9 s is 2027-01-15T08:00Z (20833.33 days); the third row is two days on.
        assert _where(conn) == {"samples_20270115": 2, "samples_20270117": 1}
        assert [(p.lo, p.hi) for p in partitions.listing(conn)] == [
            (20833 * DAY, 20834 * DAY), (20835 * DAY, 20836 * DAY),
        ]  # fmt: skip
        _upgrade(conn, "0007_trace_isolated_mask", down=True)
        assert not partitions.is_partitioned(conn)
        assert conn.execute(text("SELECT * FROM samples ORDER BY seq")).all() == before
        _upgrade(conn, "head")  # and up again, new ids continuing after the old ones
        conn.execute(
            text(
                "INSERT INTO samples (rail_id, seq, t_s, version, vin_v, vout_v, current_a, "
                "temp_c, flags) VALUES ('r1', 9, 1.8e9, 1, 12, 1, 'a', 'b', 'c')"
            )
        )
        ids = conn.execute(text("SELECT id FROM samples ORDER BY seq")).scalars().all()
        assert len(set(ids)) == 4
        assert ids[-1] > max(ids[:-1])
    engine.dispose()


async def test_sample_without_partition_is_stored_and_rolled_in(
    client: httpx.AsyncClient, app: FastAPI, settings: Settings
) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    t0 = 1.85e9  # 2028, a year and more past the partitions made ahead
    posted = await client.post("/v1/rails/bench-a/samples", json=[sample(k, EVEN, t0=t0)
                                                                    for k in range(3)])  # fmt: skip
    assert posted.json()["stored"] == 3
    with app.state.engine.connect() as conn:
        assert _where(conn) == {partitions.DEFAULT: 3}
    assert roll_partitions(app.state.engine, settings) == 1
    with app.state.engine.connect() as conn:
        assert _where(conn) == {"samples_20280816": 3}  # day 21412 (1.85e9 s), 2028-08-16
    # Duplicate and conflict detection look across partitions: seq 1 resent is absorbed,
    # seq 2 with other content, or dated in another partition, is refused.
    again = await client.post("/v1/rails/bench-a/samples", json=sample(1, EVEN, t0=t0))
    assert again.json()["duplicates"] == 1
    clash = await client.post("/v1/rails/bench-a/samples", json=sample(2, EVEN, t0=t0 + 5 * DAY))
    assert clash.status_code == 409
    assert clash.json()["field"] == "[0].seq"
    window = {"since": t0, "until": t0 + 10 * DAY}
    assert (await client.get("/v1/rails/bench-a/samples", params=window)).json()["seq"] == [0, 1, 2]


async def test_history_read_scans_only_its_partitions(
    client: httpx.AsyncClient, app: FastAPI, settings: Settings
) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    start = 1.82e9 // DAY * DAY
    days = [sample(k, EVEN, t0=start + k * DAY - k) for k in range(4)]  # one a day, 4 days
    assert (await client.post("/v1/rails/bench-a/samples", json=days)).status_code == 200
    assert roll_partitions(app.state.engine, settings) == 4
    reads: list[tuple[str, Any]] = []

    def keep(_c: Any, _cur: Any, statement: str, params: Any, *_: Any) -> None:
        if "FROM samples" in statement:
            reads.append((statement, params))

    event.listen(app.state.engine, "before_cursor_execute", keep)
    window = {"since": start + DAY, "until": start + 2 * DAY, "interval_s": 60}
    rows = (await client.get("/v1/rails/bench-a/history", params=window)).json()["rows"]
    event.remove(app.state.engine, "before_cursor_execute", keep)
    assert [r["count"] for r in rows] == [1]
    ((statement, params),) = reads  # the one read of samples the history answer made
    with app.state.engine.connect() as conn:
        plan = "\n".join(conn.exec_driver_sql(f"EXPLAIN {statement}", params).scalars())
        names = [p.name for p in partitions.listing(conn)] + [partitions.DEFAULT]
    assert [n for n in names if n in plan] == [partitions.name_for(start + DAY)]


async def test_retention_drops_a_whole_partition_with_the_same_summaries(
    client: httpx.AsyncClient, app: FastAPI, settings: Settings
) -> None:
    await client.post("/v1/rails", json=SMALL_RAIL)
    old_start = (time.time() // DAY - 3) * DAY  # three days ago, a partition's first second
    old = [sample(k, [10.0 + k % 7, 20.0, 20.0, 20.0], t0=old_start) for k in range(150)]
    for chunk in (old[:50], old[50:100], old[100:]):
        assert (await client.post("/v1/rails/bench-a/samples", json=chunk)).status_code == 200
    assert roll_partitions(app.state.engine, settings) == 1  # the default's rows move out
    window = {"since": old_start, "until": old_start + 150}
    before = (await client.get("/v1/rails/bench-a/history", params=window)).json()["rows"]
    counts = retention.run(app.state.sessions, older_than_s=DAY, interval_s=60.0)
    assert counts == {"intervals": 3, "samples_deleted": 150, "partitions_dropped": 1}
    with app.state.engine.connect() as conn:
        assert partitions.name_for(old_start) not in [p.name for p in partitions.listing(conn)]
        assert _where(conn) == {}
    after = (await client.get("/v1/rails/bench-a/history", params=window)).json()["rows"]
    assert [r["reduced"] for r in after] == [True, True, True]
    strip = [{k: v for k, v in r.items() if k != "reduced"} for r in before]
    assert strip == [{k: v for k, v in r.items() if k != "reduced"} for r in after]
    # A late sample for the dropped day lands in the default partition, and the next pass
    # reduces it row by row into the interval's summary.
    late = sample(1000, [40.0, 20.0, 20.0, 20.0], t0=old_start - 950)  # t = old_start + 50
    assert (await client.post("/v1/rails/bench-a/samples", json=late)).json()["stored"] == 1
    with app.state.engine.connect() as conn:
        assert _where(conn) == {partitions.DEFAULT: 1}
    again = retention.run(app.state.sessions, older_than_s=DAY, interval_s=60.0)
    assert again == {"intervals": 1, "samples_deleted": 1, "partitions_dropped": 0}
    first = (await client.get("/v1/rails/bench-a/history", params=window)).json()["rows"][0]
    assert first["count"] == 61
    assert first["current_a"]["max"][0] == 40.0
