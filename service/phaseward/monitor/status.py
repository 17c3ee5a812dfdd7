"""The operator's view of a rail: built from the live state row, without re-reading samples."""

from __future__ import annotations

import time
from typing import Any

import numpy as np
from sqlalchemy.orm import Session

from phaseward.monitor import rail_model
from phaseward.monitor import rails as rail_service
from phaseward.monitor.assess import hottest_margin
from phaseward.monitor.ripple_view import ripple_view
from phaseward.monitor.telemetry import FLAG_NAMES
from phaseward.store import state


def rail_status(session: Session, rail_id: str) -> dict[str, Any]:
    rail, spec = rail_service.get(session, rail_id)
    model = rail_model.build(rail.id, rail.version, spec)
    live = state.get(session, rail_id)
    out: dict[str, Any] = {
        "rail_id": rail.id,
        "version": rail.version,
        "rated_load_a": model.load_a,
        "condition": None,
        "last_sample": None,
        "phases": [],
        "capacity": None,
        "thermal": None,
        "screening": None,
        "ripple": None,
    }
    if live is None or live.version != rail.version:
        return out  # no sample judged under the present definition yet
    s = live.state
    verdict, sample = s["rail"], s["sample"]
    weights = np.asarray(s["watch"]["weights"])
    active = np.array([p["condition"] == "active" for p in s["phases"]])
    shares = np.where(active, weights, 0.0)
    shares = shares / shares.sum() if shares.sum() > 0 else shares
    limit = model.temp_limit_c
    junction = np.asarray(s["nodes_c"])[model.network.junction_node]  # estimates, not sensors
    hottest, margin = hottest_margin(model, np.asarray(s["nodes_c"]), active)
    out.update(
        condition=verdict["condition"],
        state_version=live.version,
        last_sample={
            "seq": sample["seq"],
            "time_s": sample["t_s"],
            "age_s": max(0.0, time.time() - sample["t_s"]),
            "vin_v": sample["vin_v"],
            "vout_v": sample["vout_v"],
            "ambient_c": sample["ambient_c"],
        },
        load_a=verdict["load_a"],
        capacity={
            "capacity_a": verdict["capacity_a"],
            "binding_phase": verdict["binding_phase"],
            "binding": verdict["binding"],
            "headroom_a": verdict["capacity_a"] - verdict["load_a"],
            "headroom_rated_a": verdict["capacity_a"] - model.load_a,
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
                "rated_current_a": float(model.rated_current_a[i]),
                "junction_limit_c": float(model.junction_limit_c[i]),
                "flags": [name for name, bit in FLAG_NAMES.items() if p["flags"] & bit],
            }
            for i, p in enumerate(s["phases"])
        ],
    )
    return out
