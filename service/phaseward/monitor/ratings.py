"""Time-limited ratings: how much load, for how long, as the rail is and after further losses."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from phaseward.monitor.live import LiveRail
from phaseward.physics.capacity import loss_cases, time_limited_ratings

DEFAULT_DURATIONS_S = (60.0, 600.0, 3600.0)  # 1 min, 10 min, 1 h; "indefinitely" is always added


def ratings(live: LiveRail, *, durations_s: Sequence[float], pairs: bool) -> dict[str, Any]:
    """The rating table from the present estimated state: the rail as it is, every single
    further loss of an active phase and, with ``pairs``, every pair; one kernel call for all
    cases and durations. Durations are sorted, with ``None`` (indefinitely) last."""
    model = live.model
    spans = sorted(set(float(d) for d in durations_s))
    grid = np.array([*spans, np.inf])
    masks = [live.active[None, :]]
    lost: list[list[int]] = [[]]
    for depth in (1, 2) if pairs else (1,):
        m, which = loss_cases(model.n_phases, depth, active=live.active)
        masks.append(m)
        lost.extend(which.tolist())
    table = time_limited_ratings(
        model.network, model.losses, active=np.concatenate(masks), weights=live.weights,
        rated_current_a=model.rated_current_a, trip_current_a=model.overcurrent_limit_a,
        warning_c=model.temp_limit_c, initial_c=live.nodes_c, ambient_c=live.ambient_c,
        duration_s=grid,
    )  # fmt: skip
    return {
        "load_a": live.load_a,
        "durations_s": [*spans, None],
        "cases": [
            {
                "lose_phases": lose,
                "ratings": [
                    {
                        "duration_s": None if not np.isfinite(grid[d]) else float(grid[d]),
                        "rating_a": float(table.rating_a[c, d]),
                        "headroom_a": float(table.rating_a[c, d] - live.load_a),
                        "binding": str(table.binding_kind[c, d]),
                        "binding_phase": int(table.binding_phase[c, d])
                        if table.binding_phase[c, d] >= 0
                        else None,
                    }
                    for d in range(grid.size)
                ],
            }
            for c, lose in enumerate(lost)
        ],
    }
