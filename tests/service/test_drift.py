"""Cooling drift end to end: thermal.drift from ingest, its clearing, status, and the setting.

The scenario is invented: the four-phase test rail at 22.5 A a phase, sampled at 1 Hz. After
half an hour phase 1's junction-to-board resistance rises 20 % over two hours (a thermal
interface drying), holds for half an hour, and is restored (the part reworked). The "true"
temperatures come from tests/drift_sim.py (the same network, solved mode by mode), the
readings add 0.5 K of noise, as the rail's definition says.
"""

from __future__ import annotations

import argparse
import contextlib
import io
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import httpx
import numpy as np
import numpy.typing as npt
import pytest
from fastapi import FastAPI
from phaseward_client import EventPage, RailStatus
from rich.console import Console
from sqlalchemy import select
from tests.drift_sim import simulate
from tests.factories import rail_spec
from tests.service.cuts import T0, incoming

from phaseward import operator_cli
from phaseward.api.schemas.rails import RailBody
from phaseward.monitor import rail_model
from phaseward.monitor.ingest import ingest
from phaseward.physics.losses import loss_coefficients
from phaseward.physics.thermal import steady_state_c
from phaseward.store.db import transaction
from phaseward.store.models import Event

pytestmark = pytest.mark.anyio
F64 = npt.NDArray[np.float64]
AMPS = 22.5
WARNING_C = 57.5  # the warning line: between the healthy junction (about 54) and the worn one


def spec() -> dict[str, Any]:
    body = rail_spec(id="worn")
    body["phase"] = body["phase"] | {"junction_limit_c": WARNING_C + 10.0}
    return body


def scenario(rng: np.random.Generator) -> tuple[F64, F64, F64]:
    """Sample times, true junctions and readings (n, 4) of the story in the module docstring."""
    body = spec()
    model = rail_model.build("worn", 1, RailBody(**{k: v for k, v in body.items() if k != "id"})
                             .stored())  # fmt: skip
    p0, slope = loss_coefficients(model.losses, np.full(4, AMPS))
    settled = steady_state_c(model.network, p0, slope, 25.0)[model.network.junction_node]
    power = p0 + slope * settled  # the loss at the healthy junction temperature, held
    n = 3 * 3600 + 1800

    def scale(step: int) -> F64:
        rise = np.clip((step - 1800) / 7200, 0.0, 1.0) if step < 3 * 3600 else 0.0
        return np.array([1.0, 1.0 + 0.2 * rise, 1.0, 1.0, 1.0])

    junction, readings = simulate(np.tile(power, (n, 1)), 1.0, 25.0, rng, scale=scale, chunk=60)
    return T0 + np.arange(1, n + 1), junction, readings


def bodies(t_s: F64, readings: F64, lo: int, hi: int) -> list[dict[str, Any]]:
    return [
        {"time": float(t_s[k]), "seq": k, "vin_v": 12.0, "vout_v": 1.0,
         "phases": [{"index": i, "current_a": AMPS, "temp_c": round(float(readings[k, i]), 3)}
                    for i in range(4)]}
        for k in range(lo, hi)
    ]  # fmt: skip


def events(app: FastAPI) -> list[Event]:
    with transaction(app.state.sessions) as session:
        return list(session.scalars(select(Event).order_by(Event.t_s, Event.id)).all())


async def test_drift_is_found_before_the_warning_line_and_clears(
    client: httpx.AsyncClient, app: FastAPI
) -> None:
    assert (await client.post("/v1/rails", json=spec())).status_code == 201
    t_s, junction, readings = scenario(np.random.default_rng(14))
    n = t_s.size
    for lo in range(0, 3 * 3600, 1800):
        ingest(app.state.sessions, "worn", incoming(bodies(t_s, readings, lo, lo + 1800)))
    status = (await client.get("/v1/rails/worn/status")).json()
    for lo in range(3 * 3600, n, 900):
        ingest(app.state.sessions, "worn", incoming(bodies(t_s, readings, lo, min(n, lo + 900))))

    drift = [e for e in events(app) if e.kind == "thermal.drift"]
    assert [(e.phase, e.details["cleared"]) for e in drift] == [(1, False), (1, True)]
    raised, cleared = drift
    crossing = t_s[np.argmax(junction[:, 1] > WARNING_C)]
    assert junction[:, 1].max() > WARNING_C  # the worn phase does reach its warning line
    assert raised.t_s < crossing - 1800  # drift found at least half an hour before it
    warnings = [e for e in events(app) if e.kind == "thermal.warning"]
    assert all(w.t_s > raised.t_s for w in warnings)
    # The shift began with the ramp, 1800 s in; the estimate names phase 1's resistance.
    assert T0 + 1800 <= raised.details["since_t_s"] < raised.t_s
    assert raised.details["channel"] == "phase"
    assert raised.details["extra_k_per_w"] > 0
    assert "phase 1" in raised.message
    assert "K/W" in raised.message
    assert T0 + 3 * 3600 < cleared.t_s < T0 + 3 * 3600 + 900  # within 15 min of the repair

    # At 3 h (held at +20 % of 8 K/W for half an hour) the recent estimate is near 1.6 K/W.
    phase = status["phases"][1]["drift"]
    assert phase["raised"] is True
    assert abs(phase["recent_k_per_w"] - 1.6) < 3 * phase["recent_se_k_per_w"] + 0.1, phase
    assert 0 < phase["extra_k_per_w"] < phase["recent_k_per_w"]  # the window holds the ramp
    others = [status["phases"][i]["drift"]["raised"] for i in (0, 2, 3)]
    assert others == [False, False, False]
    assert status["thermal"]["board_drift"]["raised"] is False
    assert status["thermal"]["board_drift"]["threshold"] == 35.0

    # The command line shows the phase and the estimate (the service's answers, through a
    # stand-in for the client).
    answer = await client.get("/v1/rails/worn/events", params={"kind": "thermal.drift"})
    text = command_line(RailStatus.from_json(status), EventPage.from_json(answer.json()))
    assert "DRIFT +" in text
    assert "K/W recently" in text
    assert text.count("thermal.drift") == 2
    assert "phase 1: cooling drift" in text


def command_line(status: RailStatus, page: EventPage) -> str:
    class Stand:
        def status(self, rail_id: str) -> RailStatus:
            return status

        def list_events(self, rail_id: str, **_: Any) -> EventPage:
            return page

    @contextmanager
    def connected(url: str | None, *, embedded: bool) -> Iterator[Stand]:
        yield Stand()

    screen, printed = Console(record=True, width=400), io.StringIO()
    with pytest.MonkeyPatch.context() as patch, contextlib.redirect_stdout(printed):
        patch.setattr(operator_cli, "connected", connected)
        patch.setattr(operator_cli, "out", screen)  # tables; events are printed plain
        args = argparse.Namespace(url=None, rail="worn", kind=None, follow=False, json=False,
                                  limit=100)  # fmt: skip
        assert operator_cli.status(args) == 0
        assert operator_cli.events(args) == 0
    return screen.export_text() + printed.getvalue()


@pytest.mark.parametrize(
    ("monitor", "field"),
    [
        ({"drift_threshold": 1.0}, "monitor.drift_threshold"),
        ({"drift_threshold": 1e9}, "monitor.drift_threshold"),
        ({"drift_reference": 0.0}, "monitor.drift_reference"),
        ({"drift_reference": "half"}, "monitor.drift_reference"),
    ],
)
async def test_drift_setting_out_of_range_names_the_field(
    client: httpx.AsyncClient, monitor: dict[str, Any], field: str
) -> None:
    assert (await client.post("/v1/rails", json=rail_spec(id="kept"))).status_code == 201
    answer = await client.post("/v1/rails", json=rail_spec(id="bad", monitor=monitor))
    assert answer.status_code == 422, answer.text
    assert answer.json()["field"] == field
    listed = (await client.get("/v1/rails")).json()
    assert [r["id"] for r in listed] == ["kept"]


async def test_drift_setting_is_stored_and_used(client: httpx.AsyncClient) -> None:
    body = rail_spec(id="tight", monitor={"drift_threshold": 12.0, "drift_reference": 0.5})
    answer = await client.post("/v1/rails", json=body)
    assert answer.status_code == 201, answer.text
    assert answer.json()["spec"]["monitor"]["drift_threshold"] == 12.0
    default = (await client.post("/v1/rails", json=rail_spec(id="plain"))).json()
    assert default["spec"]["monitor"]["drift_threshold"] == 35.0
    assert default["spec"]["monitor"]["drift_reference"] == 0.25
