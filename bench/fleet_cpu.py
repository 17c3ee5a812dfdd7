"""Server CPU per single sample when many rails each post one sample at a time (round-robin),
in process through the ASGI app, on SQLite or (with a URL) PostgreSQL.

Single samples round-robin over many rails are the fleet's pattern (issue 16): every request
is for another rail, so nothing per rail is warm unless the service keeps it. Prints CPU ms
per sample (process time; the client's share is small: one in-process httpx call) and, with
``--profile``, the top of a cProfile by cumulative time. Then CPU per status read of each rail.

    python bench/fleet_cpu.py --rails 200 --rounds 5 [--clients 8] [--url postgresql+psycopg://...]

``--clients`` posts side by side (group commit then merges requests of many rails).
"""

from __future__ import annotations

import argparse
import asyncio
import cProfile
import pstats
import tempfile
import time
from pathlib import Path
from typing import Any

import httpx
from sqlalchemy import create_engine, text

from phaseward.api.app import close, create_app
from phaseward.settings import Settings

PHASES = 12
T0 = 1.8e9


def _spec(rail_id: str) -> dict[str, Any]:
    from tests.factories import rail_spec

    return rail_spec(id=rail_id, phase_count=PHASES, load_a=300.0)


def _sample(seq: int, k: int) -> dict[str, Any]:
    wobble = 0.1 * ((seq * 7 + k) % 5 - 2)  # invented: a load that moves within tolerance
    phases = [
        {"index": i, "current_a": 20.0 + wobble, "temp_c": 60.0 + 0.1 * wobble}
        for i in range(PHASES)
    ]
    return {"time": T0 + seq, "seq": seq, "vin_v": 12.0, "vout_v": 1.0, "phases": phases}


async def _run(settings: Settings, rails: int, rounds: int, profile: bool, clients: int) -> float:
    app = create_app(settings, clock=lambda: T0 + 1e6)
    transport = httpx.ASGITransport(app=app)
    async with httpx.AsyncClient(transport=transport, base_url="http://fleet") as client:
        for r in range(rails):
            answer = await client.post("/v1/rails", json=_spec(f"fleet-{r}"))
            assert answer.status_code == 201, answer.text

        async def some(seq: int, first: int) -> None:
            for r in range(first, rails, clients):
                answer = await client.post(f"/v1/rails/fleet-{r}/samples", json=_sample(seq, r))
                assert answer.status_code == 200, answer.text

        async def one_round(seq: int) -> None:  # ``clients`` posting side by side
            await asyncio.gather(*(some(seq, c) for c in range(clients)))

        await one_round(0)  # each rail's first sample: its first verdict, a cold start
        profiler = cProfile.Profile() if profile else None
        if profiler:  # the monitor pass runs in a worker thread: profile it there
            _profile_writer(profiler)
        start = time.process_time()
        for seq in range(1, rounds + 1):
            await one_round(seq)
        cpu = time.process_time() - start
        start = time.process_time()
        for r in range(rails):
            answer = await client.get(f"/v1/rails/fleet-{r}/status")
            assert answer.status_code == 200, answer.text
        status_cpu = (time.process_time() - start) / rails
    close(app)
    if profiler:
        pstats.Stats(profiler).sort_stats("cumulative").print_stats(60)
    return cpu / (rails * rounds), status_cpu


def _profile_writer(profiler: cProfile.Profile) -> None:
    from phaseward.api import group_commit

    real = group_commit.ingest_rails

    def profiled(*args: Any, **kwargs: Any) -> Any:
        profiler.enable()
        try:
            return real(*args, **kwargs)
        finally:
            profiler.disable()

    group_commit.ingest_rails = profiled  # type: ignore[assignment]


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--rails", type=int, default=200)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--url", default="", help="PostgreSQL URL (default: a SQLite file)")
    parser.add_argument("--profile", action="store_true")
    parser.add_argument("--clients", type=int, default=1, help="concurrent posters")
    parser.add_argument(
        "--judge-within", type=float, default=0.0, help="PHASEWARD_JUDGE_WITHIN_S (default 0)"
    )
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        url = args.url
        if url:
            schema = f"fleet_{int(time.time())}"
            admin = create_engine(url, isolation_level="AUTOCOMMIT")
            with admin.connect() as conn:
                conn.execute(text(f"CREATE SCHEMA {schema}"))
            url = f"{url}?options=-csearch_path%3D{schema}"
        settings = Settings(
            data_dir=Path(tmp), database_url=url, auth_mode="open", future_skew_s=1e8,
            rate_per_s=1e6, rate_burst=10**6, judge_within_s=args.judge_within,
        )  # fmt: skip
        try:
            per_sample, per_status = asyncio.run(
                _run(settings, args.rails, args.rounds, args.profile, args.clients)
            )
        finally:
            if args.url:
                with admin.connect() as conn:
                    conn.execute(text(f"DROP SCHEMA {schema} CASCADE"))
                admin.dispose()
    print(
        f"{args.rails} rails, {args.rounds} rounds, {args.clients} clients, "
        f"judged within {args.judge_within:g} s: "
        f"{1e3 * per_sample:.2f} ms CPU per sample, {1e3 * per_status:.2f} ms per status read"
    )


if __name__ == "__main__":
    main()
