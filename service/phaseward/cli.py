"""The ``phaseward`` command: serve, and a demo that replays a scripted scenario over HTTP."""

from __future__ import annotations

import argparse
import errno
import os
import socket
import sys
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING

import httpx

from phaseward.cli_support import FAILED, CommandError, load_settings, usage
from phaseward.collector import quiet_collector
from phaseward.errors import PhasewardError
from phaseward.operator_cli import add_commands
from phaseward.settings import Settings

if TYPE_CHECKING:  # the service's modules load only for the commands that run one
    import uvicorn
    from fastapi import FastAPI

DESCRIPTION = (
    "phaseward watches multiphase power rails that can lose a phase and keep running. "
    "serve runs the service, demo replays a scripted fault scenario, keys and retain act on "
    "the database, and the other commands ask a running service. Settings come from PHASEWARD_* "
    "environment variables (see the README)."
)
DEMO_MARK = "CREATED-BY-PHASEWARD-DEMO"


def _listen(settings: Settings) -> socket.socket:
    """The listening socket, bound here so that a taken port is one clear line, not a log."""
    family = socket.AF_INET6 if ":" in settings.host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind((settings.host, settings.port))
    except OSError as err:
        sock.close()
        where = f"{settings.host}:{settings.port}"
        if err.errno == errno.EADDRINUSE:
            raise CommandError(
                f"port {settings.port} on {settings.host} is already in use (another phaseward?): "
                "stop what serves there or choose another port with --port or PHASEWARD_PORT"
            ) from None
        raise CommandError(
            f"cannot listen on {where}: {err.strerror}: choose an address of this machine "
            "with --host or PHASEWARD_HOST"
        ) from None
    return sock


def _server(settings: Settings) -> uvicorn.Server:
    import uvicorn

    from phaseward.api.app import create_app
    from phaseward.api.observability import configure_logging

    configure_logging(settings.log_level)
    config = uvicorn.Config(
        create_app(settings), host=settings.host, port=settings.port,
        log_level=settings.log_level, log_config=None,  # our JSON lines, not uvicorn's format
    )  # fmt: skip
    quiet_collector()
    return uvicorn.Server(config)


def serve(args: argparse.Namespace) -> int:
    overrides = {k: v for k, v in (("host", args.host), ("port", args.port)) if v is not None}
    settings = load_settings(**overrides)
    if args.workers > 1 and settings.is_sqlite:
        # SQLite has one writer at a time: processes would only queue on its lock (and 503
        # once the busy timeout ran out), so the design keeps one writing process there.
        raise usage(
            "--workers above 1 needs PostgreSQL (PHASEWARD_DATABASE_URL): SQLite takes one "
            "writer at a time, so phaseward serves it from one process"
        )
    sock = _listen(settings)
    if args.workers == 1:
        _server(settings).run(sockets=[sock])
        return 0
    sock.close()  # bound only to say in one line that the address is taken; the workers bind
    import uvicorn

    from phaseward.api.observability import configure_logging

    # Each worker builds its app from the environment (the command line's host and port go
    # there too). Their start-up work is safe side by side:
    # migrations and partition rolls take advisory locks, jobs resume under leases, and
    # retention passes lock rail rows and partitions; each rail's row lock decides which
    # worker writes its samples.
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
    from phaseward.api.app import create_app
    from phaseward.api.observability import configure_logging

    settings = Settings()
    configure_logging(settings.log_level)
    app = create_app(settings)
    quiet_collector()
    return app


def _demo_dir(data_dir: Path) -> bool:
    """Prepare the demo's data directory; whether the demo created it (and so owns the rail it
    keeps there). A directory the demo did not create is used, but nothing in it is replaced."""
    if data_dir.exists() and not data_dir.is_dir():
        raise usage(f"{data_dir} is a file, not a directory: choose another --data-dir")
    if (data_dir / DEMO_MARK).exists():
        return True
    if data_dir.exists() and any(data_dir.iterdir()):
        return False
    data_dir.mkdir(parents=True, exist_ok=True)
    (data_dir / DEMO_MARK).write_text(
        "phaseward demo created this directory; it replaces its rail demo-core here on each run.\n"
    )
    return True


def demo(args: argparse.Namespace) -> int:
    from phaseward.demo import RAIL_ID, run_scenario

    # The demo keeps its data in a directory of its own (never the service's configured
    # database) and serves on loopback in open mode: no keys, nothing reachable from elsewhere
    # (the settings refuse open mode on any other address).
    data_dir = Path(args.data_dir)
    settings = load_settings(
        auth_mode="open", data_dir=data_dir, database_url="", log_level="warning",
        **({"port": args.port} if args.port else {}),
    )  # fmt: skip
    owned = _demo_dir(data_dir)
    sock = _listen(settings)
    server = _server(settings)
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + 30
    while not server.started:
        if not thread.is_alive() or time.monotonic() > deadline:
            raise CommandError("the demo's service did not start: see the messages above")
        time.sleep(0.05)
    base = f"http://{settings.host}:{settings.port}"
    try:
        print(f"phaseward is serving {base} (database {settings.database_url})")
        if not owned and httpx.get(f"{base}/v1/rails/{RAIL_ID}").status_code == 200:
            raise CommandError(
                f"{data_dir} already holds a rail {RAIL_ID} that the demo did not create, and "
                "the demo deletes nothing it did not create: choose a new --data-dir"
            )
        ok = run_scenario(base, pace_s=0.0 if args.once else args.pace, replace=owned)
        if not args.once:
            print(f"\nThe service keeps running at {base} - try:  "
                  f"curl {base}/v1/rails/{RAIL_ID}/status")  # fmt: skip
            print("Ctrl-C stops it.")
            thread.join()
    except httpx.HTTPError as err:
        raise CommandError(f"the demo's service failed: {err}") from None
    finally:
        server.should_exit = True
        thread.join(timeout=10)
    return 0 if ok else FAILED


def keys(args: argparse.Namespace) -> int:
    """Manage access keys directly in the configured database (the first admin key has no
    other way in)."""
    from phaseward.monitor import access
    from phaseward.store.db import build_engine, build_sessionmaker, migrate

    engine = build_engine(load_settings())
    try:
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
                print(f"{row.id:>4}  {row.prefix}...  {row.role:<8} {state:<8} {scope:<20} "
                      f"{row.name}")  # fmt: skip
        else:
            try:
                row = access.revoke(sessions, args.id)
            except PhasewardError as err:
                raise CommandError(f"{err.detail}: phaseward keys list shows the keys") from None
            print(f"key {row.id} '{row.name}' revoked")
    finally:
        engine.dispose()
    return 0


def retain(args: argparse.Namespace) -> int:
    """Reduce samples older than the given age to per-interval summaries, now; on PostgreSQL
    also make the time partitions of samples ahead (as the server does hourly)."""
    from phaseward.api.app import roll_partitions
    from phaseward.monitor import retention
    from phaseward.store.db import build_engine, build_sessionmaker, migrate

    settings = load_settings()
    engine = build_engine(settings)
    try:
        migrate(engine)
        made = roll_partitions(engine, settings)
        counts = retention.run(
            build_sessionmaker(engine), older_than_s=args.older_than_days * 86400.0,
            interval_s=settings.summary_interval_s,
        )  # fmt: skip
    finally:
        engine.dispose()
    print(f"{counts['intervals']} intervals kept as summaries, "
          f"{counts['samples_deleted']} samples deleted, "
          f"{counts['partitions_dropped']} partitions dropped, {made} made")  # fmt: skip
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="phaseward", description=DESCRIPTION)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")
    p = sub.add_parser("serve", help="run the service (settings from PHASEWARD_* variables)")
    p.add_argument("--host", help="address to listen on (default PHASEWARD_HOST or 127.0.0.1)")
    p.add_argument("--port", type=int, help="port to listen on (default PHASEWARD_PORT or 8470)")
    p.add_argument(
        "--workers", type=int, default=1, choices=range(1, 65), metavar="N",
        help="server processes on one port (PostgreSQL only above 1; default 1)",
    )  # fmt: skip
    p.set_defaults(func=serve)
    p = sub.add_parser("demo", help="start the service and replay a scripted fault scenario")
    p.add_argument(
        "--once", action="store_true", help="run the scenario as fast as possible and exit"
    )
    p.add_argument("--port", type=int, help="port to serve on, loopback only (default 8470)")
    p.add_argument("--pace", type=float, default=0.05, help="seconds of wall time per sample")
    p.add_argument(
        "--data-dir", default="phaseward-demo",
        help="the demo's own data directory (default ./phaseward-demo); a directory the demo "
        "did not create is used only if it holds no rail demo-core",
    )  # fmt: skip
    p.set_defaults(func=demo)
    p = sub.add_parser("keys", help="create, list and revoke access keys (in the database)")
    actions = p.add_subparsers(dest="action", required=True, metavar="ACTION")
    made = actions.add_parser("create", help="a new key, shown once")
    made.add_argument(
        "--role", required=True, choices=("ingest", "read", "operate", "admin"),
        help="what the key may do",
    )  # fmt: skip
    made.add_argument("--name", required=True, help="who or what holds it")
    made.add_argument("--rail", action="append", help="limit the key to this rail (repeatable)")
    actions.add_parser("list", help="every key, without the secret part")
    gone = actions.add_parser("revoke", help="a key stops working at once")
    gone.add_argument("id", type=int, help="the key's number, as keys list shows it")
    p.set_defaults(func=keys)
    p = sub.add_parser("retain", help="reduce old samples to per-interval summaries now")
    p.add_argument(
        "--older-than-days", type=float, required=True, help="reduce samples older than this"
    )
    p.set_defaults(func=retain)
    add_commands(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    args = build_parser().parse_args(argv)  # a usage error exits 2 with argparse's one line
    name = f"phaseward {args.command}"
    try:
        code: int = args.func(args)
    except CommandError as err:
        print(f"{name}: {err}", file=sys.stderr)
        return err.code
    except KeyboardInterrupt:
        return 130
    except Exception as err:  # anything else: one line, never a traceback
        print(f"{name}: {type(err).__name__}: {err}: this is a phaseward bug, please report "
              "it with the command you ran", file=sys.stderr)  # fmt: skip
        return FAILED
    return code


if __name__ == "__main__":
    raise SystemExit(main())
