"""Breaker stress: does the hot-swap pass MOSFET survive limiting a short for the delay?"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from phaseward.errors import InvalidInput
from phaseward.physics.breaker import longest_safe_delay_s, stress_curve
from phaseward.physics.thermal import FosterStages


def check(
    *,
    vin_v: float,
    current_limit_a: float,
    delay_s: float,
    foster: Sequence[tuple[float, float]],
    start_temp_c: float,
    junction_limit_c: float,
    soa: Sequence[tuple[float, float]],
    curve_points: int,
) -> dict[str, Any]:
    """The check at ``delay_s``, the longest delay that passes, and a curve of log-spaced
    delays from a tenth of the shortest of (delay, first SOA point) to the longest of
    (delay, last SOA point)."""
    stages = FosterStages(
        r_k_per_w=np.array([r for r, _ in foster]), tau_s=np.array([t for _, t in foster])
    )
    soa_time = np.array([t for t, _ in soa])
    soa_current = np.array([i for _, i in soa])
    lo = min(delay_s, soa[0][0]) / 10.0
    hi = max(delay_s, soa[-1][0])
    delays = np.concatenate([[delay_s], np.geomspace(lo, hi, curve_points)])
    try:
        curve = stress_curve(
            vin_v=vin_v, current_limit_a=current_limit_a, delay_s=delays, foster=stages,
            start_temp_c=start_temp_c, junction_limit_c=junction_limit_c,
            soa_time_s=soa_time, soa_current_a=soa_current,
        )  # fmt: skip
        longest = longest_safe_delay_s(
            vin_v=vin_v, current_limit_a=current_limit_a, foster=stages,
            start_temp_c=start_temp_c, junction_limit_c=junction_limit_c,
            soa_time_s=soa_time, soa_current_a=soa_current,
        )  # fmt: skip
    except ValueError as err:  # the kernel names the argument it refused
        raise InvalidInput(str(err), field=_field_of(str(err))) from err
    rows = [
        {name: _plain(getattr(curve, name)[k]) for name in _CURVE_FIELDS}
        for k in range(delays.size)
    ]
    return {
        "power_w": vin_v * current_limit_a,
        "at_delay": rows[0],
        "longest_safe_delay_s": float(longest),
        "curve": rows[1:],
    }


_CURVE_FIELDS = (
    "delay_s", "peak_junction_c", "rise_k", "margin_k", "soa_allowed_a", "soa_margin_a",
    "passes", "binding", "within_soa_data",
)  # fmt: skip


def _plain(value: Any) -> Any:
    if isinstance(value, np.bool_ | bool):
        return bool(value)
    if isinstance(value, np.str_ | str):
        return str(value)
    number = float(value)
    return number if np.isfinite(number) else None


def _field_of(message: str) -> str:
    for name in ("soa_time_s", "soa_current_a"):
        if name in message:
            return "soa"
    return message.split()[0] if message else "body"
