"""The operator's view of a rail: built from the live state row, without re-reading samples."""

from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Any

import numpy as np
import numpy.typing as npt
from sqlalchemy.orm import Session

from phaseward.errors import NotFound
from phaseward.monitor import drift_watch, rail_model
from phaseward.monitor.assess import hottest_margin
from phaseward.monitor.rail_model import RailModel
from phaseward.monitor.resident import LiveStates, Resident
from phaseward.monitor.ripple_view import ripple_view
from phaseward.monitor.telemetry import FLAG_NAMES
from phaseward.store import rails, state


def rail_status(
    session: Session, rail_id: str, *, now_s: float, live_states: LiveStates | None = None
) -> dict[str, Any]:
    """``now_s``: the service's clock, which the newest sample's age is measured on.

    A rail whose live state this process holds in memory (``live_states``) with the stamp the
    row carries is answered from memory: the same committed state, without reading the
    definition or the state document back (:mod:`resident`)."""
    found = state.version_and_stamp(session, rail_id)
    if found is None:
        raise NotFound(f"no rail '{rail_id}'", field="rail_id")
    version, stamp = found
    held = live_states.get(rail_id) if live_states is not None else None
    if held is not None and held.version == version and held.stamp == stamp:
        return _aged(_held_view(rail_id, held), now_s)
    spec = rails.spec(session, rail_id, version)
    model = rail_model.build(rail_id, version, spec)
    row = state.get(session, rail_id)
    shown = row.state if row is not None and row.version == version else None
    return _status(rail_id, version, spec, model, shown, now_s=now_s)


_VIEWS: OrderedDict[str, tuple[int, dict[str, Any]]] = OrderedDict()  # rail: (stamp, view)
_VIEWS_LOCK = threading.Lock()
_VIEWS_KEPT = 1024  # rails whose last view is kept; a status read of another builds it again


def _held_view(rail_id: str, held: Resident) -> dict[str, Any]:
    """The status of a held state, built once per write (its stamp): operators polling a
    fleet read the same state many times between two of its samples. Only the newest
    sample's age depends on the clock (:func:`_aged`)."""
    with _VIEWS_LOCK:
        kept = _VIEWS.get(rail_id)
    if kept is not None and kept[0] == held.stamp:
        return kept[1]
    view = _status(rail_id, held.version, held.spec, held.model, held.state, now_s=0.0)
    with _VIEWS_LOCK:
        _VIEWS[rail_id] = (held.stamp, view)
        _VIEWS.move_to_end(rail_id)
        while len(_VIEWS) > _VIEWS_KEPT:
            _VIEWS.popitem(last=False)
    return view


def _aged(view: dict[str, Any], now_s: float) -> dict[str, Any]:
    """``view`` with the newest sample's age on the clock ``now_s`` (a copy: views are shared)."""
    last = view["last_sample"]
    if last is None:
        return view
    aged = last | {"age_s": now_s - last["time_s"], "ahead_of_clock": last["time_s"] > now_s}
    return view | {"last_sample": aged}


def _status(
    rail_id: str,
    version: int,
    spec: dict[str, Any],
    model: RailModel,
    s: dict[str, Any] | None,
    *,
    now_s: float,
) -> dict[str, Any]:
    out: dict[str, Any] = {
        "rail_id": rail_id,
        "version": version,
        "rated_load_a": model.load_a,
        "condition": None,
        "last_sample": None,
        "phases": [],
        "capacity": None,
        "thermal": None,
        "screening": None,
        "ripple": None,
    }
    if s is None:
        return out  # no sample judged under the present definition yet
    verdict, sample = s["rail"], s["sample"]
    watch = s["watch"]
    active = np.array([p["condition"] == "active" for p in s["phases"]])
    shares, learned, declared = (
        _fractions(np.asarray(w, dtype=np.float64), active)
        for w in (watch["weights"], watch.get("share_learned") or watch["weights"],
                  model.share_target)
    )  # fmt: skip
    limit = model.temp_limit_c
    junction = np.asarray(s["nodes_c"])[model.network.junction_node]  # estimates, not sensors
    hottest, margin = hottest_margin(model, np.asarray(s["nodes_c"]), active)
    drift = drift_watch.view(model, s.get("drift"))
    out.update(
        condition=verdict["condition"],
        state_version=version,
        last_sample={
            "seq": sample["seq"],
            "time_s": sample["t_s"],
            "age_s": now_s - sample["t_s"],
            "ahead_of_clock": sample["t_s"] > now_s,
            "vin_v": sample["vin_v"],
            "vout_v": sample["vout_v"],
            "ambient_c": sample["ambient_c"],
        },
        load_a=verdict["load_a"],
        load_assumed_a=s.get("load_assumed_a"),
        stale_phases=[i for i, p in enumerate(s["phases"]) if p.get("reading") == "held"],
        silent_phases=[i for i, p in enumerate(s["phases"]) if p["condition"] == "silent"],
        suspect_phases=[i for i, p in enumerate(s["phases"]) if p["condition"] == "suspect"],
        capacity={
            "capacity_a": verdict["capacity_a"],
            "binding_phase": verdict["binding_phase"],
            "binding": verdict["binding"],
            "headroom_a": verdict["capacity_a"] - verdict["load_a"],
            "headroom_rated_a": verdict["capacity_a"] - model.load_a,
            "counted_phases": np.flatnonzero(active).tolist(),
        },
        thermal={
            "hottest_phase": hottest,
            "hottest_temp_c": None if hottest is None else float(junction[hottest]),
            "margin_to_limit_k": margin,
            "margin_to_warning_k": None
            if hottest is None
            else float(limit[hottest] - junction[hottest]),
            "steady_junction_c": verdict["steady_junction_c"],
            "time_to_warning_s": verdict["time_to_warning_s"],
            "warning_phase": verdict["warning_phase"],
            "runaway": verdict["runaway"],
            "estimated_junction_c": [s["nodes_c"][j] for j in model.network.junction_node.tolist()],
            "junction_std_k": s["junction_std_k"],
            "board_c": s["nodes_c"][model.network.board_node],
            "board_drift": drift[-1],
        },
        screening={"n1_secure": verdict["n1_secure"], "weakest": verdict["n1_weakest"]},
        ripple=ripple_view(model, active, spec.get("output")),
        phases=[
            {
                "index": i,
                "condition": p["condition"],
                "current_a": p["current_a"],
                "temp_c": p["temp_c"],
                "share": float(shares[i]),
                "share_learned": float(learned[i]),
                "share_declared": float(declared[i]),
                "rated_current_a": float(model.rated_current_a[i]),
                "junction_limit_c": float(model.junction_limit_c[i]),
                "flags": [name for name, bit in FLAG_NAMES.items() if p["flags"] & bit],
                "reading": p.get("reading", "fresh"),
                "reading_age_s": p.get("reading_age_s"),
                "assumed_a": p.get("assumed_a"),
                "implausible": p.get("implausible"),
                "drift": drift[i],
            }
            for i, p in enumerate(s["phases"])
        ],
    )
    return out


def _fractions(weights: npt.NDArray[np.float64], active: npt.NDArray[np.bool_]) -> list[float]:
    """Relative shares as fractions of the rail current over the active phases."""
    shares = np.where(active, weights, 0.0)
    total = shares.sum()
    return [float(x) for x in (shares / total if total > 0 else shares)]
