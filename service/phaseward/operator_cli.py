"""Operator and firmware-developer commands of ``phaseward``, talking to a service through
the Python client (``clients/python``, shipped inside the service's distribution too): status,
events, screening, forecast, ratings, rehearse, export-settings, calibrate, capture. Tables by
default (readable at 80 columns), ``--json`` for scripts. Plain text: nothing the service says
is read as markup."""

from __future__ import annotations

import argparse
import csv
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
from phaseward_client import Client, Event, PhasewardError
from phaseward_client.models import DriftStatus, PhaseStatus
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


def sample_age(age_s: float) -> str:
    """A sample's age on the server's clock, honest about samples dated ahead of it.

    >>> sample_age(5.2), sample_age(-12.0)
    ('5 s ago', "12 s ahead of this server's clock")
    """
    if age_s < 0:
        return f"{-age_s:.0f} s ahead of this server's clock"
    return f"{age_s:.0f} s ago"


def reading_note(p: PhaseStatus) -> str:
    """What a phase's figures rest on, in words (the page says the same)."""
    notes = []
    if p.implausible is not None:
        got = (
            f"{p.implausible.current_a:g} A"
            if p.implausible.rule.startswith("current") and p.implausible.current_a is not None
            else f"{p.implausible.temp_c:g} degC"
        )
        notes.append(f"suspect: implausible reading {got} ({p.implausible.rule}), left out")
    if p.reading == "held" and p.reading_age_s is not None:
        notes.append(f"last good reading, {p.reading_age_s:.0f} s old")
    if p.reading == "missing":
        notes.append("no reading")
    if p.assumed_a is not None:
        notes.append(f"load assumes {p.assumed_a:.1f} A")
    return "; ".join(notes) or "fresh"


def drift_cell(d: DriftStatus | None) -> str:
    """A cooling path's drift test in a table cell: the extra thermal resistance while an
    episode is open, else how far the statistic is towards its threshold.

    >>> from phaseward_client import DriftStatus
    >>> drift_cell(DriftStatus(True, 2.0, 35.0, 1.21, 0.05, 1.8e9, 1.62, 0.04))
    '+1.21 K/W'
    >>> drift_cell(DriftStatus(False, 7.4, 35.0, None, None, None))
    '7/35'
    """
    if d is None:
        return "-"
    if not d.raised:
        return f"{d.statistic:.0f}/{d.threshold:.0f}"
    return f"+{_n(d.extra_k_per_w, 2)} K/W"


def drift_note(d: DriftStatus | None) -> str:
    """A cooling path's drift test in words: the extra thermal resistance while an episode is
    open, else how far the statistic is towards its threshold.

    >>> from phaseward_client import DriftStatus
    >>> drift_note(DriftStatus(True, 2.0, 35.0, 1.21, 0.05, 1.8e9, 1.62, 0.04))
    'DRIFT +1.21 +- 0.05 K/W since it began, +1.62 +- 0.04 K/W recently'
    >>> drift_note(DriftStatus(False, 7.4, 35.0, None, None, None))
    'none (7/35)'
    """
    if d is None:
        return "-"
    if not d.raised:
        return f"none ({d.statistic:.0f}/{d.threshold:.0f})"
    text = f"DRIFT +{_n(d.extra_k_per_w, 2)} +- {_n(d.extra_se_k_per_w, 2)} K/W since it began"
    if d.recent_k_per_w is not None:
        text += f", +{_n(d.recent_k_per_w, 2)} +- {_n(d.recent_se_k_per_w, 2)} K/W recently"
    return text


def status(args: argparse.Namespace) -> int:
    with connected(args.url, embedded=False) as client:
        s = client.status(args.rail)
    if args.json:
        _dump(s)
        return 0
    cap, th = s.capacity, s.thermal
    out.print(f"{s.rail_id} v{s.version}: {s.condition or 'no telemetry yet'}")
    if s.last_sample is not None:
        out.print(f"newest sample seq {s.last_sample.seq}, {sample_age(s.last_sample.age_s)}")
    if cap is not None and th is not None:
        out.print(
            f"load {_n(s.load_a)} A, capacity {_n(cap.capacity_a)} A ({cap.binding}), "
            f"headroom {_n(cap.headroom_a)} A; hottest junction {_n(th.hottest_temp_c)} degC, "
            f"margin to its limit {_n(th.margin_to_limit_k)} K, "
            f"to its warning line {_n(th.margin_to_warning_k)} K"
        )
    if s.load_assumed_a is not None:
        out.print(f"the load assumes {_n(s.load_assumed_a)} A for phases without a reading")
    table = _table(
        "phase", "condition", "current A", "sensor degC", "junction degC", "share", "reading",
        "drift",
    )  # fmt: skip
    junctions = th.estimated_junction_c if th is not None else []
    for p in s.phases:
        table.add_row(
            str(p.index), p.condition, _n(p.current_a), _n(p.temp_c),
            _n(junctions[p.index] if junctions else None), f"{100 * p.share:.1f} %",
            reading_note(p), drift_cell(p.drift),
        )  # fmt: skip
    out.print(table)
    for p in s.phases:
        if p.drift is not None and p.drift.raised:
            out.print(f"phase {p.index}: cooling drift to the board, {drift_note(p.drift)}")
    if th is not None and th.board_drift is not None:
        out.print(f"board path to ambient, cooling drift: {drift_note(th.board_drift)}")
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
                    _show_event(e, flush=True)
            return 0
        page = client.list_events(args.rail, kind=kinds, limit=args.limit)
    if args.json:
        _dump([e.__dict__ for e in page.items])
        return 0
    for e in page.items:
        _show_event(e)
    if not page.items:
        print("no events")
    return 0


_EXPOSED_STYLE = "bold yellow"


def event_kind(e: Event) -> str:
    """An event's kind as printed: N-1 security lost or regained is spelled out beside
    ``capacity.exposed``, which reads too much like the rail condition ``exposed``."""
    if e.kind == "capacity.exposed":
        return f"{e.kind} (N-1 {'regained' if e.cleared else 'LOST'})"
    return e.kind


def _security_lost(e: Event) -> bool:
    return e.kind == "capacity.exposed" and not e.cleared


def _drift_recent(e: Event) -> str:
    d = e.drift
    if d is None or d.cleared or d.recent_k_per_w is None:
        return ""
    return f"; recently +{_n(d.recent_k_per_w, 2)} +- {_n(d.recent_se_k_per_w, 2)} K/W"


def _fault_class(signature: dict[str, Any] | None) -> str:
    if not signature:
        return ""
    return (
        f"; fault class {signature['kind']} ({signature['confidence']:.2f}, from "
        f"{signature.get('source', 'samples')}): {signature['reason']}"
    )


def _event_lines(e: Event) -> str:
    """One event in two lines that fit 80 columns: who, when, what; then the message (with
    the fault class, if one was found)."""
    when = e.time[:19].replace("T", " ")
    phase = "" if e.phase is None else f"  phase {e.phase}"
    head = f"#{e.id:<5} {when}  {e.severity:<8} {e.rail_id}  {event_kind(e)}{phase}"
    message = e.message + _fault_class(e.details.get("signature")) + _drift_recent(e)
    body = textwrap.fill(message, width=80, initial_indent="       ",
                         subsequent_indent="       ")  # fmt: skip
    return f"{head}\n{body}"


def _show_event(e: Event, *, flush: bool = False) -> None:
    """An event printed; N-1 security lost is highlighted on a terminal (plain text in a pipe,
    where "N-1 LOST" says it)."""
    if _security_lost(e) and out.is_terminal:
        out.print(_event_lines(e), style=_EXPOSED_STYLE, soft_wrap=True)
    else:
        print(_event_lines(e), flush=flush)


CAPTURE_TYPES = {".csv": "text/csv", ".npy": "application/x-npy", ".npz": "application/x-npz"}


def capture(args: argparse.Namespace) -> int:
    path = Path(args.file)
    media = CAPTURE_TYPES.get(path.suffix.lower())
    if media is None:
        raise usage(f"a capture is a .csv, .npy or .npz file, not {path.name}: name one of those")
    content = read_input(args.file, "the capture")
    with connected(args.url, embedded=False) as client:
        answer = client.upload_capture(args.rail, args.event, content, content_type=media)
    if args.json:
        _dump(answer)
        return 0
    sig = answer["signature"]
    out.print(
        f"capture {answer['id']} of event {answer['event_id']} (phase {answer['phase']}): "
        f"{answer['n_samples']} samples, {', '.join(answer['channels'])}"
    )
    out.print(f"fault class: {sig['kind']} (confidence {sig['confidence']:.2f})")
    out.print(f"  {sig['reason']}")
    table = _table("evidence", "value", "used")
    for name, value in sig["evidence"].items():
        shown = "-" if value is None else f"{value:.4g}"
        table.add_row(name, shown, "yes" if name in sig["used"] else "")
    out.print(table)
    out.print(answer["caution"])
    return 0


def screening(args: argparse.Namespace) -> int:
    with connected(args.url, embedded=False) as client:
        s = client.screening(args.rail, depth=args.depth)
    if args.json:
        _dump(s)
        return 0
    verdict = "secure" if s.secure else "NOT secure"
    out.print(f"{s.rail_id} at {_n(s.load_a)} A: N-{s.depth} {verdict}")
    table = _table(
        "lose",
        "capacity A",
        "headroom A",
        "bound by",
        "steady hottest degC",
        "warning in s",
        "then",
    )
    for c in s.cases:
        table.add_row(
            ",".join(map(str, c.lose_phases)), _n(c.capacity_a), _n(c.headroom_a), c.binding,
            _n(c.steady_hottest_c), _n(c.time_to_warning_s, 0), _then(c.cascade, c.down_at_s),
        )  # fmt: skip
    out.print(table)
    out.print(s.caution)
    return 0


def ratings(args: argparse.Namespace) -> int:
    durations = [m * 60.0 for m in args.minutes or ()]
    with connected(args.url, embedded=False) as client, err.status("rating ..."):
        r = client.ratings(args.rail, durations_s=durations, pairs=args.pairs)
    if args.json:
        _dump(r)
        return 0
    out.print(
        f"{r.rail_id} at {_n(r.load_a)} A: the highest constant load in A for "
        "each duration, and what binds it"
    )
    heads = ["lose"] + [
        "indefinitely" if d is None else (f"{d / 60:g} min" if d < 3600 else f"{d / 3600:g} h")
        for d in r.durations_s
    ]
    table = _table(*heads)
    short = {"rating": "rating", "trip_current": "trip", "warning_line": "warning", "none": "-"}
    for c in r.cases:
        table.add_row(
            ",".join(map(str, c.lose_phases)) or "none",
            *(f"{x.rating_a:.1f} ({short.get(x.binding, x.binding)})" for x in c.ratings),
        )
    out.print(table)
    out.print(
        "binds: rating = a phase's current rating, trip = its trip current, warning = a "
        "junction's warning line (limit minus margin)"
    )
    out.print(r.caution)
    return 0


_CAUSES = {
    "requested": "dropped as asked",
    "trip_current": "trips on current",
    "junction_limit": "shuts down at its junction limit",
}


def _then(steps: list[Any], down_at_s: float | None) -> str:
    """A loss case's cascade in words: "trips 2 at 0 s, 3 at 41 s; down at 41 s"."""
    words = [
        f"{'trips' if s.cause == 'trip_current' else 'overheats'} {s.phase} at {s.at_s:.0f} s"
        for s in steps
    ]
    if down_at_s is not None:
        words.append(f"down at {down_at_s:.0f} s")
    return "; ".join(words) or "holds"


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

    def reach(at: float | None, phase: int | None) -> str:
        return "not within the horizon" if at is None else f"in {at:.0f} s (phase {phase})"

    verdict = f.verdict.upper() if f.verdict != "holds" else f.verdict
    when = "" if f.verdict_at_s is None else f" at {f.verdict_at_s:.0f} s: {f.verdict_cause}"
    out.print(f"{f.rail_id}: {verdict}{when}")
    summary = (
        f"warning line {reach(f.time_to_warning_s, f.warning_phase)}; "
        f"limit {reach(f.time_to_limit_s, f.limit_phase)}; "
    )
    if f.peak is not None:
        summary += (
            f"peak {f.peak.temp_c:.1f} degC on phase {f.peak.phase} at {f.peak.time_s:.0f} s; "
        )
    summary += (
        f"margin to warning {_n(f.margin_to_warning_k)} K, to limit {_n(f.margin_to_limit_k)} K"
        + ("; THERMAL RUNAWAY" if f.runaway else "")
    )
    out.print(summary)
    for c in f.cascade:
        why = _CAUSES.get(c.cause, c.cause)
        amps = "" if c.current_a is None else f" ({c.current_a:.1f} A)"
        out.print(f"  {c.at_s:.0f} s: phase {c.phase} {why}{amps}")
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
    content = read_input(args.trace, "the trace")
    settings = read_json(args.settings, "the settings file")
    labels = read_json(args.labels, "the labels file") if args.labels else []
    missing = {"policy": args.missing, **({"hold_s": args.hold} if args.hold is not None else {})}
    with connected(args.url, embedded=True) as client:
        # text/plain: the service tells CSV from JSON by content, whatever the extension
        trace = client.upload_trace(content, content_type="text/plain", name=trace_path.name)
        job = client.start_rehearsal(
            {"trace": {"trace_id": trace["id"]}, "settings": settings, "labels": labels,
             "missing": missing}
        )  # fmt: skip
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
        f"rehearsal {job['id']}: {result['combinations']} combinations over "
        f"{trace['n_samples']} samples" + (f"; fixed: {', '.join(fixed)}" if fixed and rows else "")
    )
    out.print(
        "Pareto front (false trips against worst detection latency; a missed fault counts as "
        "infinitely late; tied rows grouped, their values joined by |):"
    )
    table = _table("#", "tied", "settings", "trips", "false", "missed", "worst s")
    for group in result["pareto_groups"]:
        row = rows[group["rows"][0]]
        tied = [rows[i] for i in group["rows"]]
        # every swept setting whole (name=value, tied values joined by |), wrapped in its cell
        shown = " ".join(f"{a}={_tied_values(a, tied)}" for a in swept) or "-"
        table.add_row(
            str(row["index"]), str(len(group["rows"])), shown, str(row["trips"]),
            str(row["false_trips"]), str(row["missed"]), _n(row["max_latency_s"], 3),
        )  # fmt: skip
    out.print(table)
    out.print(f"export a row: phaseward export-settings {job['id']} ROW --header out.h")
    for trip in result["trips"] or []:
        where = f"phase {trip['phase']}" if trip["phase"] >= 0 else "the input"
        out.print(f"  trip at {trip['time_s']:.3f} s: {where}, {trip['rule']}, {trip['value']:.3g}")
    return 0


def _tied_values(axis: str, rows: list[dict[str, Any]]) -> str:
    """The value the tied rows take for ``axis``, or every one of them (``90|100``)."""
    return "|".join(f"{v:g}" for v in sorted({r["settings"][axis] for r in rows}))


def export_settings(args: argparse.Namespace) -> int:
    with connected(args.url, embedded=False) as client:
        exported = client.export_settings(args.rehearsal, args.row)
        header = client.export_header(args.rehearsal, args.row) if args.header else None
    if header is not None:
        Path(args.header).write_text(header)
        err.print(f"wrote {args.header}")
    if args.json or header is None:
        _dump(exported)
    return 0


def _curve(path: str) -> tuple[list[float], list[float]]:
    """time_s and temp_c from a heating-curve CSV (README, "Rehearsal and calibration
    formats"): a row whose temp_c is empty or nan is left out (no reading then)."""
    text = read_input(path, "the heating curve").decode("utf-8-sig", "replace")
    lines = [ln for ln in text.splitlines() if ln.strip()]
    rows = list(csv.DictReader(lines))
    if not rows or not {"time_s", "temp_c"} <= set(rows[0]):
        raise usage(f"the heating curve {path} must be CSV with time_s and temp_c columns "
                    "(see examples/README.md)")  # fmt: skip
    t_s, temp_c = [], []
    for line, row in enumerate(rows, start=2):
        cell = (row["temp_c"] or "").strip()
        if cell == "" or cell.lower() == "nan":
            continue
        try:
            t_s.append(float(row["time_s"]))
            temp_c.append(float(cell))
        except (TypeError, ValueError):
            raise usage(
                f"the heating curve {path}, line {line}: time_s '{row['time_s']}' or temp_c "
                f"'{cell}' is not a number"
            ) from None
    return t_s, temp_c


def _stage_counts(text: str) -> list[int]:
    try:
        return [int(k) for k in text.split(",")]
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"'{text}' is not a comma-separated list of counts"
        ) from None


def calibrate(args: argparse.Namespace) -> int:
    if args.rail is None and args.power is None:
        raise usage("give --power (no rail needed), or --rail with --current")
    if args.rail is None and args.apply != "no":
        raise usage("--apply stores the fit in a rail: give --rail")
    t_s, temp_c = _curve(args.curve)
    body: dict[str, Any] = {
        "t_s": t_s, "temp_c": temp_c, "cooling": args.cooling, "location": args.location,
        "time_unit": args.time_unit,
    }  # fmt: skip
    if args.orders:
        body["orders"] = args.orders
    if args.reference_temp is not None:
        body["reference_temp_c"] = args.reference_temp
    body |= {"power_w": args.power} if args.power is not None else {"current_a": args.current}
    with connected(args.url, embedded=True) as client, err.status("fitting ..."):
        if args.rail is None:
            fit = client.fit_curve(body)
        else:
            fit = client.calibrate(args.rail, body | {"phase": args.phase, "apply": args.apply})
    if args.json:
        _dump(fit)
        return 0
    chosen = fit["chosen"]
    low, high = chosen["total_r_ci_k_per_w"]
    out.print(f"chosen order {fit['order']} by {fit['criterion'].upper()} ({fit['note']})")
    out.print(
        f"total thermal resistance {chosen['total_r_k_per_w']:.4g} K/W "
        f"(95 % {_n(low, 4)} .. {_n(high, 4)}); "
        + ("settled" if fit["settled"] else f"NOT settled ({fit['settled_rule']})")
    )
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
    if fit["skipped_orders"]:
        out.print(f"orders not tried (too few samples per parameter): {fit['skipped_orders']}")
    for warning in fit["warnings"]:
        err.print(f"warning: {warning}")
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
    p = command("ratings", ratings, "how much load, for how long: time-limited ratings")
    p.add_argument("rail", help="the rail's id")
    p.add_argument(
        "--minutes", type=float, action="append",
        help="a duration in minutes (repeatable; default 1, 10, 60; indefinitely always shown)",
    )  # fmt: skip
    p.add_argument("--pairs", action="store_true", help="also every pair of further losses")
    p = command("rehearse", rehearse, "replay a trace against protection settings")
    p.add_argument(
        "trace",
        help="a recorded trace: CSV (header time_s, i0_a.., optional vin_v, t0_c.., iso0..) or "
        "samples as JSON / NDJSON, told apart by content; see the README section 'Rehearsal "
        "and calibration formats'",
    )
    p.add_argument(
        "--settings", required=True,
        help="JSON object: setting name -> a number, or a list of numbers to sweep (e.g. "
        '{"oc_level_a": [20, 25], "oc_debounce_s": 0.002})',
    )  # fmt: skip
    p.add_argument(
        "--labels",
        help="JSON list of fault windows: start_s, end_s, phase (-1: the rail), kind ('any' "
        "or a rule name)",
    )
    p.add_argument(
        "--missing", choices=("hold", "clear"), default="hold",
        help="a missing temperature or vin reading: hold the last one (default) or clear",
    )  # fmt: skip
    p.add_argument("--hold", type=float, help="longest hold of a reading, s (default 1)")
    p.add_argument("--csv", help="write the result table here")
    p.add_argument("--svg", help="write the Pareto plot here")
    p = command("capture", capture, "attach a capture of a trip to its event and classify it")
    p.add_argument("rail", help="the rail's id")
    p.add_argument("event", type=int, help="id of the phase.isolated event")
    p.add_argument("file", help="CSV (.csv) or NumPy (.npy, .npz) waveform around the trip")
    p = command("export-settings", export_settings, "a rehearsal row as firmware settings")
    p.add_argument("rehearsal", type=int, help="the rehearsal's id")
    p.add_argument("row", type=int, help="the row (combination) to export")
    p.add_argument("--header", help="write the settings as a C header to this file")
    p = command("calibrate", calibrate, "fit a thermal model to a heating or cooling curve")
    p.add_argument(
        "curve",
        help="CSV with columns time_s (since the power step) and temp_c (degC); rows with an "
        "empty or nan temp_c are left out",
    )
    p.add_argument("--rail", help="the rail to calibrate (needed for --current and --apply)")
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
    p.add_argument(
        "--orders", type=_stage_counts,
        help="Foster stage counts to try, comma-separated (default 1,2,3,4)",
    )  # fmt: skip
    p.add_argument("--reference-temp", type=float,
                   help="temperature before the step, degC (default: fitted)")  # fmt: skip
    p.add_argument("--time-unit", choices=("s", "ms", "us"), default="s",
                   help="the unit of the time_s column (default s)")  # fmt: skip
