"""What assessing the rail at tolerance points (a time grid, drift beyond tolerances) instead
of at every sample may cost, bounded against assessing every sample.

Each invented trace (tests/service/cuts.py, and a rail warming under a steady load as its
ambient climbs, so the thermal limit comes to bind its capacity) is judged one sample at a
time twice: with the default tolerances, and with tolerances so small that every sample is
assessed. At every sample the verdict the live state carries is compared with the verdict
assessed at that very sample:

* remaining capacity within the load tolerance (2 % of the rail's total rated current);
* condition, N-1 security and the presence of a warning forecast differ only while the
  carried verdict is younger than one grid cell (it catches up at the next assessment);
* the time to the warning line, counted from the newest sample (the carried figure less the
  age of its assessment), is never later than assessing at every sample gives: it errs early.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
from tests.factories import rail_spec
from tests.service.cuts import TRACES, Trace, _bodies, _heating, incoming

from phaseward.api.schemas.rails import RailCreate
from phaseward.monitor import rail_model
from phaseward.monitor.ingest import TOLERANCES, Tolerances, advance
from phaseward.monitor.telemetry import to_batch

EVERY_SAMPLE = Tolerances(grid_s=1e-6, load=1e-12, temp_k=1e-12, vout=1e-12, weight=1e-12)


def warming() -> Trace:
    """A 4-phase rail at 104 A (invented) while its ambient climbs 50 K in 400 s."""
    rng = np.random.default_rng(7)
    n = 400
    t = 1.8e9 + np.arange(n, dtype=np.float64)
    ambient = 25.0 + 50.0 * np.arange(n) / n
    current = np.full((n, 4), 26.0) + rng.normal(0.0, 0.15, (n, 4))
    temp = _heating(current, t, 0.0, 2.4) + ambient[:, None] + rng.normal(0.0, 0.1, (n, 4))
    return Trace("warming", rail_spec(), _bodies(t, current, temp, ambient=ambient))


def verdicts(trace: Trace, tolerances: Tolerances) -> tuple[list[dict[str, Any]], float]:
    """The live state's verdict and its age (s) after each sample, posted one at a time;
    and the rail's total rated current."""
    model = rail_model.build(
        "tol", 1, RailCreate.model_validate(trace.spec | {"id": "tol"}).stored()
    )
    batch = to_batch(incoming(trace.samples), model)
    state: dict[str, Any] = {}
    out = []
    for k in range(batch.n):
        state, _ = advance(model, batch.take(np.array([k])), state, tolerances)
        out.append(state["rail"] | {"age_s": float(batch.t_s[k]) - state["assessed"]["t_s"]})
    return out, float(model.rated_current_a.sum())


@pytest.mark.parametrize("trace", [*TRACES.values(), warming()], ids=lambda t: t.name)
def test_tolerance_points_stay_within_the_stated_bounds_of_assessing_every_sample(
    trace: Trace,
) -> None:
    carried, rated_a = verdicts(trace, TOLERANCES)
    exact, _ = verdicts(trace, EVERY_SAMPLE)
    assert all(v["age_s"] == 0.0 for v in exact)
    assert any(v["age_s"] > 0.0 for v in carried)  # the tolerances did skip samples
    for got, want in zip(carried, exact, strict=True):
        assert abs(got["capacity_a"] - want["capacity_a"]) <= TOLERANCES.load * rated_a
        for key in ("condition", "n1_secure"):
            assert got[key] == want[key] or got["age_s"] < TOLERANCES.grid_s
        forecast = (got["time_to_warning_s"] is None, want["time_to_warning_s"] is None)
        assert forecast[0] == forecast[1] or got["age_s"] < TOLERANCES.grid_s
        if None not in (got["time_to_warning_s"], want["time_to_warning_s"]):
            from_now = max(0.0, got["time_to_warning_s"] - got["age_s"])
            assert from_now <= want["time_to_warning_s"] + 1e-9


def test_the_warming_trace_binds_on_the_thermal_limit_between_assessments() -> None:
    """The bounds above are exercised where they can bite: capacity moves with temperature
    between assessments (not only with phase conditions, which force an assessment)."""
    carried, _ = verdicts(warming(), TOLERANCES)
    assert {"rating", "warning_line"} <= {v["binding"] for v in carried}
    capacities = [v["capacity_a"] for v in carried if v["binding"] == "warning_line"]
    assert len(set(capacities)) > 1
