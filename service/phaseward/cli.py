"""The ``phaseward`` command: serve, and a demo that replays a scripted scenario over HTTP."""

from __future__ import annotations

import argparse
import gc
import os
import sys
import threading
import time
from collections.abc import Sequence

import uvicorn
from fastapi import FastAPI
from pydantic import ValidationError

from phaseward.api.app import create_app
from phaseward.api.observability import configure_logging
from phaseward.operator_cli import add_commands
from phaseward.settings import Settings


def _server(settings: Settings) -> uvicorn.Server:
    configure_logging(settings.log_level)
    config = uvicorn.Config(
        create_app(settings), host=settings.host, port=settings.port,
        log_level=settings.log_level, log_config=None,  # our JSON lines, not uvicorn's format
    )  # fmt: skip
    # What exists now (libraries, schemas, the app) lives as long as the process: out of the
    # collector's sight, a full collection walks only what requests leave behind (a full pass
    # over everything paused every request for tens of milliseconds under load).
    gc.freeze()
    return uvicorn.Server(config)


def serve(args: argparse.Namespace) -> int:
    overrides = {k: v for k, v in (("host", args.host), ("port", args.port)) if v is not None}
    settings = Settings(**overrides)
    if args.workers == 1:
        _server(settings).run()
        return 0
    if settings.is_sqlite:
        # SQLite has one writer at a time: processes would only queue on its lock (and 503
        # once the busy timeout ran out), so the design keeps one writing process there.
        print(
            "--workers above 1 needs PostgreSQL (PHASEWARD_DATABASE_URL): SQLite takes one "
            "writer at a time, so phaseward serves it from one process",
            file=sys.stderr,
        )
        return 2
    # Each worker builds its app from the environment (the command line's host and port go
    # there too). Their start-up work is safe side by side: migrations and partition rolls
    # take advisory locks, jobs resume under leases, and retention passes lock rail rows and
    # partitions; each rail's row lock decides which worker writes its samples.
    os.environ.update({f"PHASEWARD_{k.upper()}": str(v) for k, v in overrides.items()})
    configure_logging(settings.log_level)
    uvicorn.run(
        "phaseward.cli:worker_app", factory=True, host=settings.host, port=settings.port,
        workers=args.workers, log_level=settings.log_level, log_config=None,
        timeout_worker_healthcheck=WORKER_START_S,
    )  # fmt: skip
    return 0


# A worker answers the supervisor's health check only once its imports are done; on a busy
# 2-core machine that took longer than uvicorn's 5 s default, and the worker was killed.
WORKER_START_S = 60


def worker_app() -> FastAPI:
    """One worker process's app (``serve --workers N``), set up as ``_server`` does."""
    settings = Settings()
    configure_logging(settings.log_level)
    app = create_app(settings)
    gc.freeze()  # as in _server: the start-up heap stays out of full collections
    return app


def demo(args: argparse.Namespace) -> int:
    from phaseward.demo import run_scenario

    # The demo serves on loopback in open mode: no keys, nothing reachable from elsewhere
    # (the settings refuse open mode on any other address).
    try:
        settings = Settings(auth_mode="open", **({"port": args.port} if args.port else {}))
    except ValidationError as err:
        print(f"the demo cannot start: {err.errors()[0]['msg']}", file=sys.stderr)
        return 2
    server = _server(settings.model_copy(update={"log_level": "warning"}))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            print("the service did not start", file=sys.stderr)
            return 1
        time.sleep(0.05)
    base = f"http://{settings.host}:{settings.port}"
    print(f"phaseward is serving {base} (database {settings.database_url})")
    ok = run_scenario(base, pace_s=0.0 if args.once else args.pace)
    if args.once:
        server.should_exit = True
        thread.join(timeout=10)
        return 0 if ok else 1
    print(f"\nThe service keeps running at {base} - try:  curl {base}/v1/rails/demo-core/status")
    print("Ctrl-C stops it.")
    try:
        thread.join()
    except KeyboardInterrupt:
        server.should_exit = True
        thread.join(timeout=10)
    return 0 if ok else 1


def keys(args: argparse.Namespace) -> int:
    """Manage access keys directly in the configured database (the first admin key has no
    other way in)."""
    from phaseward.monitor import access
    from phaseward.store.db import build_engine, build_sessionmaker, migrate

    engine = build_engine(Settings())
    migrate(engine)
    sessions = build_sessionmaker(engine)
    if args.action == "create":
        row, plain = access.create(sessions, name=args.name, role=args.role, rails=args.rail)
        scope = ", ".join(row.rails) if row.rails else "every rail"
        print(f"key {row.id} '{row.name}', role {row.role}, for {scope}:")
        print(plain)
        print("Keep it now: phaseward stores only its digest and cannot show it again.")
    elif args.action == "list":
        for row in access.listing(sessions):
            state = "revoked" if row.revoked_s is not None else "active"
            scope = ",".join(row.rails) if row.rails else "*"
            print(f"{row.id:>4}  {row.prefix}...  {row.role:<8} {state:<8} {scope:<20} {row.name}")
    else:
        row = access.revoke(sessions, args.id)
        print(f"key {row.id} '{row.name}' revoked")
    engine.dispose()
    return 0


def retain(args: argparse.Namespace) -> int:
    """Reduce samples older than the given age to per-interval summaries, now; on PostgreSQL
    also make the time partitions of samples ahead (as the server does hourly)."""
    from phaseward.api.app import roll_partitions
    from phaseward.monitor import retention
    from phaseward.store.db import build_engine, build_sessionmaker, migrate

    settings = Settings()
    engine = build_engine(settings)
    migrate(engine)
    made = roll_partitions(engine, settings)
    counts = retention.run(
        build_sessionmaker(engine), older_than_s=args.older_than_days * 86400.0,
        interval_s=settings.summary_interval_s,
    )  # fmt: skip
    print(f"{counts['intervals']} intervals kept as summaries, "
          f"{counts['samples_deleted']} samples deleted, "
          f"{counts['partitions_dropped']} partitions dropped, {made} made")  # fmt: skip
    engine.dispose()
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="phaseward", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    p = sub.add_parser("serve", help="run the service (settings from PHASEWARD_* variables)")
    p.add_argument("--host")
    p.add_argument("--port", type=int)
    p.add_argument(
        "--workers", type=int, default=1, choices=range(1, 65), metavar="N",
        help="server processes on one port (PostgreSQL only above 1; default 1)",
    )  # fmt: skip
    p.set_defaults(func=serve)
    p = sub.add_parser("demo", help="start the service and replay a scripted fault scenario")
    p.add_argument(
        "--once", action="store_true", help="run the scenario as fast as possible and exit"
    )
    p.add_argument("--port", type=int)
    p.add_argument("--pace", type=float, default=0.05, help="seconds of wall time per sample")
    p.set_defaults(func=demo)
    p = sub.add_parser("keys", help="create, list and revoke access keys (in the database)")
    actions = p.add_subparsers(dest="action", required=True)
    made = actions.add_parser("create", help="a new key, shown once")
    made.add_argument("--role", required=True, choices=("ingest", "read", "operate", "admin"))
    made.add_argument("--name", required=True, help="who or what holds it")
    made.add_argument("--rail", action="append", help="limit the key to this rail (repeatable)")
    actions.add_parser("list", help="every key, without the secret part")
    gone = actions.add_parser("revoke", help="a key stops working at once")
    gone.add_argument("id", type=int)
    p.set_defaults(func=keys)
    p = sub.add_parser("retain", help="reduce old samples to per-interval summaries now")
    p.add_argument("--older-than-days", type=float, required=True)
    p.set_defaults(func=retain)
    add_commands(sub)
    args = parser.parse_args(argv)
    code: int = args.func(args)
    return code


if __name__ == "__main__":
    raise SystemExit(main())
