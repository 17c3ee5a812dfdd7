"""The demo: an invented rail in an invented lab, and a scripted day on its test rack.

Orrery Instruments' bring-up lab runs the "Tern" accelerator card on rack B4. Its 0.75 V core
rail has six phases behind per-phase breakers. The script: steady running, a high-side switch
short that trips phase 2's breaker, a load step, then a rack fan failing and the inlet air
warming slowly until the five survivors can no longer carry the load within their limit.
Telemetry temperatures come from phaseward's own thermal model driven by the scripted
currents, plus sensor noise, so the numbers hang together. All data here is invented.
"""

from __future__ import annotations

from typing import Any

import httpx
import numpy as np

from phaseward.api.schemas.rails import RailBody
from phaseward.monitor.rail_model import build, phase_power
from phaseward.physics.thermal import simulate_c, steady_state_c

RAIL_ID = "demo-core"
N_PHASES = 6
FAILED_PHASE = 2
T_FAULT, T_STEP, T_WARM, T_END = 60, 120, 180, 600  # s from the start of the script
SKEW = (1.02, 0.99, 1.0, 1.015, 0.98, 1.015)  # layout-dependent current sharing
WARMING_K = 45.0  # a rack fan fails and the inlet air climbs from 30 to 75 degC

DEMO_RAIL: dict[str, Any] = {
    "id": RAIL_ID,
    "name": "Tern card core rail, rack B4, Orrery Instruments bring-up lab",
    "vin_v": 12.0,
    "vout_v": 0.75,
    "switching_hz": 600e3,
    "load_a": 180.0,
    "ambient_c": 30.0,
    "phase_count": N_PHASES,
    "phase": {
        "rated_current_a": 45.0,
        "overcurrent_limit_a": 60.0,
        "junction_limit_c": 125.0,
        "warning_margin_k": 15.0,
        "inductor": {"inductance_h": 150e-9, "dcr_ohm": 0.25e-3, "dcr_ref_c": 20.0},
        "power_stage": {
            "rds_high_ohm": 4.0e-3,
            "rds_low_ohm": 1.2e-3,
            "rds_ref_c": 25.0,
            "rds_tc_per_k": 0.004,
            "rise_time_s": 4e-9,
            "fall_time_s": 4e-9,
            "gate_charge_c": 25e-9,
            "drive_v": 5.0,
            "dead_time_s": 15e-9,
            "diode_drop_v": 0.7,
        },
        "core_loss_w": 0.25,
        "thermal": [
            {"r_k_per_w": 0.8, "tau_s": 0.02},
            {"r_k_per_w": 2.7, "tau_s": 2.0},
            {"r_k_per_w": 3.0, "tau_s": 30.0},
        ],
    },
    "board": {"to_ambient_k_per_w": 0.55, "capacitance_j_per_k": 300.0},
    "output": {"capacitance_f": 0.0047, "esr_ohm": 0.00015},
    # Per-phase failure rate for the reliability answer (the tour asks for it).
    "reliability": {"fit_at_ref": 50.0, "ref_c": 55.0, "activation_ev": 0.7},
    "monitor": {"debounce_samples": 2, "forecast_horizon_s": 900.0},
}


def scenario_samples(start_s: float, seed: int = 7) -> list[dict[str, Any]]:
    """One sample a second for the whole script, as the rack would post them."""
    rng = np.random.default_rng(seed)
    t = np.arange(T_END, dtype=np.float64)
    load = np.where(t < T_STEP, 140.0, 175.0)
    ambient = 30.0 + np.clip((t - T_WARM) / (T_END - T_WARM), 0.0, 1.0) * WARMING_K
    active = np.ones((t.size, N_PHASES), dtype=bool)
    active[t >= T_FAULT, FAILED_PHASE] = False
    share = np.where(active, np.asarray(SKEW), 0.0)
    current = load[:, None] * share / share.sum(axis=1, keepdims=True)

    spec = RailBody.model_validate({k: v for k, v in DEMO_RAIL.items() if k != "id"}).stored()
    model = build(RAIL_ID, 0, spec)
    p0, slope = phase_power(model, current, active)
    start = steady_state_c(model.network, p0[0], slope[0], float(ambient[0]))
    trajectory = simulate_c(model.network, start, 1.0, p0, slope, ambient)[:-1]
    junction = trajectory[:, model.network.junction_node]
    sensor = junction - 3.0 + rng.normal(0.0, 0.3, junction.shape)  # sensor beside the die

    vin = 12.0 + rng.normal(0.0, 0.01, t.size)
    vout = 0.75 + rng.normal(0.0, 0.0008, t.size)
    # The high-side switch of phase 2 fails short just before T_FAULT: its current surges,
    # the input sags and the output overshoots until the breaker opens.
    current[T_FAULT - 1, FAILED_PHASE] *= 2.6
    vin[T_FAULT - 1 : T_FAULT + 1] -= (1.4, 2.6)
    vout[T_FAULT - 1 : T_FAULT + 1] += (0.03, 0.05)
    samples = []
    for k in range(t.size):
        phases = []
        for i in range(N_PHASES):
            tripped = not active[k, i]
            amps = 0.0 if tripped else current[k, i] + rng.normal(0.0, 0.15)
            phases.append({
                "index": i,
                "current_a": round(float(amps), 3),
                "temp_c": round(float(sensor[k, i]), 2),
                "breaker_tripped": bool(tripped),
                "overcurrent": bool(amps > DEMO_RAIL["phase"]["overcurrent_limit_a"]),
            })  # fmt: skip
        samples.append({
            "time": start_s + float(t[k]),
            "seq": k,
            "vin_v": round(float(vin[k]), 4),
            "vout_v": round(float(vout[k]), 5),
            "ambient_c": round(float(ambient[k]), 2),
            "phases": phases,
        })  # fmt: skip
    return samples


def run_scenario(base_url: str, *, pace_s: float, replace: bool, chunk: int = 5) -> bool:
    """Create the demo rail and post the script, printing what phaseward makes of it; with
    ``replace``, a demo rail from an earlier run is deleted first (the caller vouches that the
    demo created it). Returns whether the service reported what the script implies (the
    isolation and a capacity drop)."""
    import time

    samples = scenario_samples(time.time() - T_END)
    with httpx.Client(base_url=base_url, timeout=30.0) as client:
        if replace:
            client.delete(f"/v1/rails/{RAIL_ID}")
        client.post("/v1/rails", json=DEMO_RAIL).raise_for_status()
        print(f"rail {RAIL_ID}: {DEMO_RAIL['name']}")
        print(f"{'t':>5}  {'condition':<10} {'load A':>7} {'capacity A':>10} {'bound by':<12} "
              f"{'hottest C':>9} {'to limit K':>10}")  # fmt: skip
        seen_event = 0
        capacities: list[float] = []
        isolated = False
        last_line = None
        for k in range(0, len(samples), chunk):
            answer = client.post(f"/v1/rails/{RAIL_ID}/samples", json=samples[k : k + chunk])
            answer.raise_for_status()
            status = client.get(f"/v1/rails/{RAIL_ID}/status").json()
            page = client.get(f"/v1/rails/{RAIL_ID}/events", params={"limit": 50}).json()
            fresh = [e for e in reversed(page["items"]) if e["id"] > seen_event]
            for e in fresh:
                seen_event = max(seen_event, e["id"])
                phase = "" if e["phase"] is None else f" phase {e['phase']}"
                print(f"      ! {e['severity']:<8} {e['kind']}{phase}: {e['message']}")
                isolated |= e["kind"] == "phase.isolated" and e["phase"] == FAILED_PHASE
            cap, th = status["capacity"], status["thermal"]
            capacities.append(cap["capacity_a"])
            line = (status["condition"], cap["binding"])
            if line != last_line or fresh or k % 60 == 0:
                print(
                    f"{k + chunk:>5}  {status['condition']:<10} {status['load_a']:>7.1f} "
                    f"{cap['capacity_a']:>10.1f} {cap['binding']:<12} "
                    f"{_shown(th['hottest_temp_c']):>9} {_shown(th['margin_to_limit_k']):>10}"
                )
                last_line = line
            if k <= T_FAULT + 10 < k + chunk:
                _show_analyses(client)
            if pace_s:
                time.sleep(pace_s * chunk)
        print(f"\n{status['caution']}")
    return isolated and min(capacities) < capacities[0]


def _show_analyses(client: httpx.Client) -> None:
    """What an operator asks right after a phase loss: would one more loss hurt, and where
    are the temperatures heading at the load the rail must deliver?"""
    isolated = client.get(
        f"/v1/rails/{RAIL_ID}/events", params={"kind": "phase.isolated", "limit": 1}
    ).json()["items"]
    signature = isolated[0]["details"].get("signature") if isolated else None
    if signature is not None:
        print(f"      fault class of phase {isolated[0]['phase']}: {signature['kind']} "
              f"(confidence {signature['confidence']:.2f}; {signature['reason']})")  # fmt: skip
    screening = client.get(f"/v1/rails/{RAIL_ID}/screening").json()
    verdict = "secure" if screening["secure"] else "NOT secure"
    print(f"      N-1 screening at {screening['load_a']:.0f} A: {verdict}; weakest losses:")
    for case in screening["cases"][:2]:
        print(f"        lose phase {case['lose_phases'][0]}: capacity {case['capacity_a']:.1f} A, "
              f"headroom {case['headroom_a']:.1f} A, bound by {case['binding']}")  # fmt: skip
    rated = DEMO_RAIL["load_a"]
    body = {"load": {"constant_a": rated}, "horizon_s": 3600, "points": 60}
    ahead = client.post(f"/v1/rails/{RAIL_ID}/forecast", json=body).json()
    reach = ahead["time_to_warning_s"]
    print(f"      forecast at the rated {rated:.0f} A for 1 h: {ahead['verdict']}; peak "
          f"{ahead['peak']['temp_c']:.1f} degC on phase {ahead['peak']['phase']}, margin to the "
          f"warning line {_shown(ahead['margin_to_warning_k'])} K, warning line "
          f"{'not reached' if reach is None else f'reached in {reach:.0f} s'}")  # fmt: skip


def _shown(value: float | None) -> str:
    return "-" if value is None else f"{value:.1f}"
