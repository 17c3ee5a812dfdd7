"""Operator and firmware-developer commands of ``phaseward``, talking to a service through
the Python client (``clients/python``, shipped inside the service's distribution too): status,
events, screening, forecast, rehearse, calibrate. Tables by default (readable at 80 columns),
``--json`` for scripts. Plain text: nothing the service says is read as markup."""

from __future__ import annotations

import argparse
import csv
import io
import json
import os
import textwrap
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import httpx
from phaseward_client import Client, PhasewardError
from rich import box
from rich.console import Console
from rich.progress import BarColumn, Progress, TaskProgressColumn, TextColumn
from rich.table import Table

from phaseward.cli_support import CommandError, read_input, read_json, usage

DEFAULT_URL = "http://127.0.0.1:8470"
out = Console(markup=False, highlight=False)
err = Console(stderr=True, markup=False, highlight=False)


def _table(*columns: str) -> Table:
    """A table that fits 80 columns: light rules, no outer padding."""
    return Table(*columns, box=box.SIMPLE_HEAD, pad_edge=False, show_edge=False)


@contextmanager
def connected(url: str | None, *, embedded: bool) -> Iterator[Client]:
    """A client for ``url`` (or PHASEWARD_URL, or the default); with ``embedded`` and no
    service answering there, an in-process service on the embedded SQLite default."""
    base = url or os.environ.get("PHASEWARD_URL") or DEFAULT_URL
    if not base.startswith(("http://", "https://")):
        raise usage(f"the service URL {base} is not an http:// or https:// address")
    with Client(base, timeout_s=120, api_key=os.environ.get("PHASEWARD_KEY")) as client:
        try:
            client.health()
        except (httpx.TransportError, PhasewardError):  # nothing (or not phaseward) answers
            if not embedded or url:
                raise CommandError(
                    f"no phaseward service answers at {base}: start one (phaseward serve) or "
                    "point --url or PHASEWARD_URL at one"
                ) from None
        else:
            yield client
            return
    with _embedded() as local, Client(local, timeout_s=120) as client:
        err.print(f"started an embedded service at {local}")
        yield client


@contextmanager
def _embedded() -> Iterator[str]:
    import socket

    import uvicorn

    from phaseward.api.app import create_app
    from phaseward.settings import Settings

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = int(s.getsockname()[1])
    # In-process and on loopback only, for this one command: open mode, no keys needed.
    settings = Settings(host="127.0.0.1", port=port, log_level="warning", auth_mode="open")
    server = uvicorn.Server(
        uvicorn.Config(create_app(settings), host="127.0.0.1", port=port, log_level="warning")
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    while not server.started:
        if not thread.is_alive():
            raise CommandError("the embedded service did not start: see the messages above")
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=10)


def _dump(data: Any) -> None:
    print(json.dumps(data, indent=2, default=lambda o: o.__dict__))


def _n(value: float | None, digits: int = 1) -> str:
    return "-" if value is None else f"{value:.{digits}f}"


def status(args: argparse.Namespace) -> int:
    with connected(args.url, embedded=False) as client:
        s = client.status(args.rail)
    if args.json:
        _dump(s)
        return 0
    cap, th = s.capacity, s.thermal
    out.print(f"{s.rail_id} v{s.version}: {s.condition or 'no telemetry yet'}")
    if cap is not None and th is not None:
        out.print(
            f"load {_n(s.load_a)} A, capacity {_n(cap.capacity_a)} A ({cap.binding}), "
            f"headroom {_n(cap.headroom_a)} A; hottest junction {_n(th.hottest_temp_c)} degC, "
            f"margin {_n(th.margin_k)} K"
        )
    table = _table("phase", "condition", "current A", "sensor degC", "junction degC", "share")
    junctions = th.estimated_junction_c if th is not None else []
    for p in s.phases:
        table.add_row(
            str(p.index), p.condition, _n(p.current_a), _n(p.temp_c),
            _n(junctions[p.index] if junctions else None), f"{100 * p.share:.1f} %",
        )  # fmt: skip
    out.print(table)
    out.print(s.caution)
    return 0


def events(args: argparse.Namespace) -> int:
    with connected(args.url, embedded=False) as client:
        kinds = args.kind or ()
        if args.follow:
            for e in client.follow_events(rail_id=args.rail, kind=kinds):
                if args.json:
                    print(json.dumps(e.__dict__), flush=True)
                else:
                    print(_event_lines(e), flush=True)
            return 0
        page = client.list_events(args.rail, kind=kinds, limit=args.limit)
    if args.json:
        _dump([e.__dict__ for e in page.items])
        return 0
    for e in page.items:
        print(_event_lines(e))
    if not page.items:
        print("no events")
    return 0


def _event_lines(e: Any) -> str:
    """One event in two lines that fit 80 columns: who, when, what; then the message."""
    when = e.time[:19].replace("T", " ")
    phase = "" if e.phase is None else f"  phase {e.phase}"
    head = f"#{e.id:<5} {when}  {e.severity:<8} {e.rail_id}  {e.kind}{phase}"
    body = textwrap.fill(e.message, width=80, initial_indent="       ",
                         subsequent_indent="       ")  # fmt: skip
    return f"{head}\n{body}"


def screening(args: argparse.Namespace) -> int:
    with connected(args.url, embedded=False) as client:
        s = client.screening(args.rail, depth=args.depth)
    if args.json:
        _dump(s)
        return 0
    verdict = "secure" if s.secure else "NOT secure"
    out.print(f"{s.rail_id} at {_n(s.load_a)} A: N-{s.depth} {verdict}")
    table = _table(
        "lose", "capacity A", "headroom A", "binding", "steady hottest degC", "limit in s"
    )
    for c in s.cases:
        table.add_row(
            ",".join(map(str, c.lose_phases)), _n(c.capacity_a), _n(c.headroom_a), c.binding,
            _n(c.steady_hottest_c), _n(c.time_to_limit_s, 0),
        )  # fmt: skip
    out.print(table)
    out.print(s.caution)
    return 0


def forecast(args: argparse.Namespace) -> int:
    from phaseward_client import Load, PhaseDrop

    drops = [PhaseDrop(phase=p, at_s=args.at) for p in args.drop or ()]
    load = None if args.load is None else Load.constant(args.load)
    with connected(args.url, embedded=False) as client, err.status("forecasting ..."):
        f = client.forecast(
            args.rail, load=load, drop=drops, horizon_s=args.hours * 3600, points=args.points
        )
    if args.json:
        _dump(f)
        return 0
    reach = (
        "not within the horizon"
        if f.time_to_limit_s is None
        else f"in {f.time_to_limit_s:.0f} s (phase {f.limit_phase})"
    )
    peak = f.peak
    summary = f"{f.rail_id}: limit reached {reach}; "
    if peak is not None:
        summary += f"peak {peak.temp_c:.1f} degC on phase {peak.phase} at {peak.time_s:.0f} s; "
    summary += f"margin {_n(f.margin_k)} K" + ("; THERMAL RUNAWAY" if f.runaway else "")
    out.print(summary)
    table = _table("t s", "load A", "hottest junction degC", "board degC")
    step = max(1, len(f.time_s) // 12)
    for k in range(0, len(f.time_s), step):
        table.add_row(
            f"{f.time_s[k]:.0f}", _n(f.load_a[k]), _n(max(f.junction_c[k])), _n(f.board_c[k])
        )
    out.print(table)
    out.print(f.caution)
    return 0


def rehearse(args: argparse.Namespace) -> int:
    trace_path = Path(args.trace)
    recorded = read_input(args.trace, "the trace")
    settings = read_json(args.settings, "the settings file")
    labels = read_json(args.labels, "the labels file") if args.labels else []
    kind = "text/csv" if trace_path.suffix.lower() == ".csv" else "application/x-ndjson"
    with connected(args.url, embedded=True) as client:
        trace = client.upload_trace(recorded, content_type=kind, name=trace_path.name)
        job = client.start_rehearsal(
            {"trace": {"trace_id": trace["id"]}, "settings": settings, "labels": labels}
        )
        columns = (TextColumn("rehearsal {task.fields[job]}"), BarColumn(), TaskProgressColumn())
        with Progress(*columns, console=err, transient=True) as bar:
            task = bar.add_task("rehearse", total=100.0, job=job["id"])
            while (state := client.rehearsal(job["id"]))["status"] not in ("done", "failed"):
                bar.update(task, completed=state["percent"])
                time.sleep(0.2)
        if state["status"] == "failed":
            raise CommandError(f"the rehearsal failed: {state['error']}")
        if args.csv:
            Path(args.csv).write_text(client.rehearsal_file(job["id"], "table.csv"))
        if args.svg:
            Path(args.svg).write_text(client.rehearsal_file(job["id"], "pareto.svg"))
    result = state["result"]
    if args.json:
        _dump(result)
        return 0
    rows = result["rows"]
    # Only the swept settings get a column (80 columns hold two or three); the fixed ones are
    # said once above the table.
    swept = [a for a in result["axes"] if len({r["settings"][a] for r in rows}) > 1]
    fixed = [f"{a} {rows[0]['settings'][a]:g}" for a in result["axes"] if a not in swept]
    out.print(
        f"{result['combinations']} combinations over {trace['n_samples']} samples"
        + (f"; fixed: {', '.join(fixed)}" if fixed and rows else "")
    )
    out.print("Pareto front (false trips against worst detection latency):")
    table = _table("#", *swept, "trips", "false trips", "missed", "latency s")
    for i in result["pareto"]:
        row = rows[i]
        table.add_row(
            str(i), *(f"{row['settings'][a]:g}" for a in swept), str(row["trips"]),
            str(row["false_trips"]), str(row["missed"]), _n(row["max_latency_s"], 3),
        )  # fmt: skip
    out.print(table)
    for trip in result["trips"] or []:
        where = f"phase {trip['phase']}" if trip["phase"] >= 0 else "the input"
        out.print(f"  trip at {trip['time_s']:.3f} s: {where}, {trip['rule']}, {trip['value']:.3g}")
    return 0


def calibrate(args: argparse.Namespace) -> int:
    text = read_input(args.curve, "the heating curve").decode("utf-8", errors="replace")
    rows = list(csv.DictReader(io.StringIO(text)))
    if not rows or not {"time_s", "temp_c"} <= set(rows[0]):
        raise usage(f"the heating curve {args.curve} must be CSV with time_s and temp_c columns "
                    "(see examples/README.md)")  # fmt: skip
    try:
        t_s = [float(r["time_s"]) for r in rows]
        temp_c = [float(r["temp_c"]) for r in rows]
    except (TypeError, ValueError):
        raise usage(f"the heating curve {args.curve} has a row that is not two numbers") from None
    body: dict[str, Any] = {
        "t_s": t_s,
        "temp_c": temp_c,
        "phase": args.phase, "cooling": args.cooling, "location": args.location,
        "apply": args.apply,
    }  # fmt: skip
    body |= {"power_w": args.power} if args.power is not None else {"current_a": args.current}
    with connected(args.url, embedded=True) as client, err.status("fitting ..."):
        fit = client.calibrate(args.rail, body)
    if args.json:
        _dump(fit)
        return 0
    out.print(f"chosen order {fit['order']} by {fit['criterion'].upper()} ({fit['note']})")
    table = _table("order", "R K/W (95 % CI)", "tau s (95 % CI)", "rms K", "BIC")
    for f in fit["fits"]:
        rs = "; ".join(
            f"{s['r_k_per_w']:.4g} ({_n(s['r_ci_k_per_w'][0], 3)}..{_n(s['r_ci_k_per_w'][1], 3)})"
            for s in f["stages"]
        )
        ts = "; ".join(
            f"{s['tau_s']:.4g} ({_n(s['tau_ci_s'][0], 3)}..{_n(s['tau_ci_s'][1], 3)})"
            for s in f["stages"]
        )
        table.add_row(str(f["order"]), rs, ts, f"{f['rms_k']:.3g}", f"{f['bic']:.1f}")
    out.print(table)
    if fit["applied_version"] is not None:
        out.print(f"applied as version {fit['applied_version']} of {args.rail}")
    return 0


def _reporting(fn: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    """Run a command; a refusal from the service or a lost connection becomes one line (the
    ``phaseward`` entry point prints it and exits 1)."""

    def run(args: argparse.Namespace) -> int:
        try:
            return fn(args)
        except PhasewardError as refusal:
            where = f" ({refusal.field})" if refusal.field else ""
            hint = _HINTS.get(refusal.status, "")
            raise CommandError(
                f"{refusal.status} {refusal.error}{where}: {refusal.detail}{hint}"
            ) from None
        except httpx.TransportError as lost:
            raise CommandError(f"the service stopped answering ({lost}): try again") from None

    return run


_HINTS = {
    401: " (set PHASEWARD_KEY to an access key)",
    403: " (this key's role or rails do not allow it)",
}


def add_commands(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    def command(
        name: str, fn: Callable[[argparse.Namespace], int], help_text: str
    ) -> argparse.ArgumentParser:
        p = sub.add_parser(name, help=help_text)
        p.add_argument("--url", help=f"service URL (default PHASEWARD_URL or {DEFAULT_URL})")
        # The access key comes from PHASEWARD_KEY only: a key on the command line would be
        # left in shell history and process lists.
        p.add_argument("--json", action="store_true", help="JSON instead of tables")
        p.set_defaults(func=_reporting(fn))
        return p

    p = command("status", status, "a rail's condition, capacity, margin and phases")
    p.add_argument("rail", help="the rail's id")
    p = command("events", events, "recent events, or follow them live")
    p.add_argument("--rail", help="only this rail's events (default: every rail)")
    p.add_argument(
        "--kind", action="append", help="only this kind, e.g. phase.isolated (repeatable)"
    )
    p.add_argument("--limit", type=int, default=50, help="at most this many, newest first")
    p.add_argument("--follow", action="store_true", help="stream events as they happen")
    p = command("screening", screening, "what each further phase loss would leave")
    p.add_argument("rail", help="the rail's id")
    p.add_argument(
        "--depth", type=int, choices=(1, 2), default=1, help="further losses at once: 1 or 2"
    )
    p = command("forecast", forecast, "junction temperatures ahead, with optional phase drops")
    p.add_argument("rail", help="the rail's id")
    p.add_argument("--load", type=float, help="total current in A (default: the present load)")
    p.add_argument("--drop", type=int, action="append", help="phase to lose (repeatable)")
    p.add_argument("--at", type=float, default=0.0, help="when the phases drop, s")
    p.add_argument("--hours", type=float, default=1.0, help="how far ahead, h (default 1)")
    p.add_argument("--points", type=int, default=200, help="time points in the answer")
    p = command("rehearse", rehearse, "replay a trace against protection settings")
    p.add_argument("trace", help="CSV (.csv) or NDJSON samples")
    p.add_argument("--settings", required=True, help="JSON: setting -> value or list to sweep")
    p.add_argument("--labels", help="JSON list of fault windows")
    p.add_argument("--csv", help="write the result table here")
    p.add_argument("--svg", help="write the Pareto plot here")
    p = command("calibrate", calibrate, "fit a phase's thermal model to a heating curve")
    p.add_argument("curve", help="CSV with time_s and temp_c")
    p.add_argument("--rail", required=True, help="the rail whose phase was heated")
    step = p.add_mutually_exclusive_group(required=True)
    step.add_argument("--power", type=float, help="the power step, W")
    step.add_argument("--current", type=float, help="the phase current during the step, A")
    p.add_argument("--phase", type=int, default=0, help="the phase that was heated (default 0)")
    p.add_argument("--cooling", action="store_true", help="the curve is a cool-down after the step")
    p.add_argument(
        "--location", choices=("junction", "sensor"), default="junction",
        help="where the temperature was read",
    )  # fmt: skip
    p.add_argument(
        "--apply", choices=("no", "phase", "all"), default="no",
        help="store the fit as a new rail version: for that phase, for all, or not (default)",
    )  # fmt: skip
