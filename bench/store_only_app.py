"""The floor of batched ingest: an endpoint that reads a columnar body, parses and checks it with
phaseward's own columnar schema, and stores the same rows durably (one transaction per request,
WAL, the service's synchronous setting), with no monitor, no live state and no events.

What HTTP, the schema and a durable insert cost in this stack on this machine before any
physics: phaseward's batched rows cannot exceed it, so the bench prints it beside them. The
bench's bodies carry every phase in every sample, which the row packing here relies on.

Served by ``python -m bench.store_only_app PORT DATA_DIR`` with uvicorn configured as
``phaseward serve`` configures it (one process, default loop and HTTP parser, no access log).
"""

from __future__ import annotations

import sqlite3
import sys
import threading
from pathlib import Path

import uvicorn
from fastapi import FastAPI, Request, Response
from starlette.concurrency import run_in_threadpool

from phaseward.api.schemas.columns import parse_columns
from phaseward.settings import Settings
from phaseward.store.db import build_engine, migrate

INSERT = (
    "INSERT INTO samples (rail_id, seq, t_s, version, vin_v, vout_v, iout_a, ambient_c, "
    "current_a, temp_c, flags) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
)
MAX_SAMPLES = 1000


def open_store(data_dir: Path) -> sqlite3.Connection:
    """The service's schema, migrated as the service migrates it, opened with its pragmas."""
    settings = Settings(data_dir=data_dir)
    engine = build_engine(settings)
    migrate(engine)
    engine.dispose()
    db = sqlite3.connect(data_dir / "phaseward.db", isolation_level=None, check_same_thread=False)
    db.execute("PRAGMA journal_mode=WAL")
    db.execute(f"PRAGMA synchronous={settings.sqlite_synchronous}")
    return db


def build_app(db: sqlite3.Connection) -> FastAPI:
    app = FastAPI()
    lock = threading.Lock()  # one writer, as SQLite has
    known: set[str] = set()

    def store(rail_id: str, body: bytes) -> None:
        s = parse_columns(body, max_items=MAX_SAMPLES)
        n = s.seq.size
        current, temp = s.current_a.reshape(n, -1), s.temp_c.reshape(n, -1)
        flags = s.flags.reshape(n, -1)
        rows = [
            (rail_id, seq, t, 1, vin, vout, None, None, c.tobytes(), tc.tobytes(), f.tobytes())
            for seq, t, vin, vout, c, tc, f in zip(
                s.seq.tolist(), s.t_s.tolist(), s.vin_v.tolist(), s.vout_v.tolist(),
                current, temp, flags, strict=True,
            )
        ]  # fmt: skip
        with lock:
            db.execute("BEGIN IMMEDIATE")
            if rail_id not in known:  # the samples' foreign key
                db.execute(
                    "INSERT OR IGNORE INTO rails (id, version, created_s, updated_s) "
                    "VALUES (?, 1, 0, 0)",
                    (rail_id,),
                )
                known.add(rail_id)
            db.executemany(INSERT, rows)
            db.execute("COMMIT")

    @app.post("/v1/rails/{rail_id}/samples")
    async def ingest(rail_id: str, request: Request) -> Response:
        await run_in_threadpool(store, rail_id, await request.body())
        return Response(status_code=200)

    @app.get("/healthz")
    def healthz() -> dict[str, str]:
        return {"status": "ok"}

    return app


if __name__ == "__main__":
    app = build_app(open_store(Path(sys.argv[2])))
    uvicorn.run(app, host="127.0.0.1", port=int(sys.argv[1]), log_level="warning",
                access_log=False, log_config=None)  # fmt: skip
