"""The ``phaseward`` command: serve, and a demo that replays a scripted scenario over HTTP."""

from __future__ import annotations

import argparse
import sys
import threading
import time
from collections.abc import Sequence

import uvicorn

from phaseward.api.app import create_app
from phaseward.operator_cli import add_commands
from phaseward.settings import LOOPBACK_HOSTS, Settings


def _server(settings: Settings) -> uvicorn.Server:
    config = uvicorn.Config(
        create_app(settings), host=settings.host, port=settings.port, log_level=settings.log_level
    )
    return uvicorn.Server(config)


def serve(args: argparse.Namespace) -> int:
    overrides = {k: v for k, v in (("host", args.host), ("port", args.port)) if v is not None}
    _server(Settings(**overrides)).run()
    return 0


def demo(args: argparse.Namespace) -> int:
    from phaseward.demo import run_scenario

    settings = Settings(**({"port": args.port} if args.port is not None else {}))
    if settings.host not in LOOPBACK_HOSTS:
        print("the demo binds loopback only", file=sys.stderr)
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


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="phaseward", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    p = sub.add_parser("serve", help="run the service (settings from PHASEWARD_* variables)")
    p.add_argument("--host")
    p.add_argument("--port", type=int)
    p.set_defaults(func=serve)
    p = sub.add_parser("demo", help="start the service and replay a scripted fault scenario")
    p.add_argument(
        "--once", action="store_true", help="run the scenario as fast as possible and exit"
    )
    p.add_argument("--port", type=int)
    p.add_argument("--pace", type=float, default=0.05, help="seconds of wall time per sample")
    p.set_defaults(func=demo)
    add_commands(sub)
    args = parser.parse_args(argv)
    code: int = args.func(args)
    return code


if __name__ == "__main__":
    raise SystemExit(main())
