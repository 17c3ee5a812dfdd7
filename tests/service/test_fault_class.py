"""The fault class in a phase.isolated event: undetermined from samples alone (with the
reason), classified once a capture of the trip is attached; captures refused with the problem
named and nothing stored changed."""

from __future__ import annotations

import io
from typing import Any, get_args

import httpx
import numpy as np
import pytest
from fastapi import FastAPI
from tests.buck_sim import BuckCase, as_csv, as_npy, as_npz, columns, simulate
from tests.conftest import MakeSettings
from tests.factories import SMALL_RAIL, rail_spec, sample

from phaseward.api.app import close, create_app
from phaseward.api.schemas.rails import FeatureName
from phaseward.monitor import access
from phaseward.physics.signatures import FEATURES

pytestmark = pytest.mark.anyio
EVEN = [20.0, 20.0, 20.0, 20.0]
CSV, NPY, NPZ = "text/csv", "application/x-npy", "application/x-npz"


def trace() -> list[dict[str, Any]]:
    """The scenario of issue 14: a high-side short at 1 s per sample; the trip sample shows a
    7.5 % input sag and a 3.2 % output overshoot, phase 1 tripped from then on."""
    out = []
    for k in range(15):
        if k < 8:
            body = sample(k, EVEN)
        else:
            body = sample(k, [80 / 3, 0.0, 80 / 3, 80 / 3])
            body["phases"][1]["breaker_tripped"] = True
        out.append(body)
    out[8]["vin_v"], out[8]["vout_v"] = 12.0 * 0.925, 1.032
    out[8]["phases"][1]["current_a"] = 52.0
    return out


async def isolation(client: httpx.AsyncClient, rail: dict[str, Any] = SMALL_RAIL) -> Any:
    assert (await client.post("/v1/rails", json=rail)).status_code == 201
    body = trace()
    for k in range(0, len(body), 3):  # posted in small pieces, as a rack would
        answer = await client.post(f"/v1/rails/{rail['id']}/samples", json=body[k : k + 3])
        assert answer.status_code == 200, answer.text
    page = await client.get(f"/v1/rails/{rail['id']}/events", params={"kind": "phase.isolated"})
    (event,) = page.json()["items"]
    return event


def upload(kind: str, fmt: str = CSV, **channels: bool) -> bytes:
    cols = columns(simulate(BuckCase(fault=kind, noise=0.02, seed=7)), 1, **channels)
    return {CSV: as_csv, NPY: as_npy, NPZ: as_npz}[fmt](cols)


async def post_capture(
    client: httpx.AsyncClient,
    event_id: int,
    content: bytes,
    media: str = CSV,
    rail: str = "bench-a",
) -> httpx.Response:
    return await client.post(
        f"/v1/rails/{rail}/events/{event_id}/capture", content=content,
        headers={"content-type": media},
    )  # fmt: skip


async def signature_of(client: httpx.AsyncClient, event_id: int) -> Any:
    page = await client.get("/v1/rails/bench-a/events", params={"kind": "phase.isolated"})
    (event,) = [e for e in page.json()["items"] if e["id"] == event_id]
    return event["details"]["signature"]


async def test_samples_alone_are_undetermined_with_the_reason(client: httpx.AsyncClient) -> None:
    event = await isolation(client)
    signature = event["details"]["signature"]
    assert signature["kind"] == "undetermined"
    assert signature["source"] == "samples"
    assert signature["reason"] == "one sample per 1 s is slower than the event; attach a capture"
    assert signature["evidence"] == {"sample_interval_s": 1.0}


@pytest.mark.parametrize(
    ("kind", "fmt"),
    [("high_side_short", CSV), ("low_side_short", NPZ), ("open_phase", NPY),
     ("gate_drive_loss", CSV), ("no_fault", NPZ)],
)  # fmt: skip
async def test_a_capture_classifies_the_isolation(
    client: httpx.AsyncClient, kind: str, fmt: str
) -> None:
    event = await isolation(client)
    answer = await post_capture(client, event["id"], upload(kind, fmt), fmt)
    assert answer.status_code == 201, answer.text
    out = answer.json()
    assert (out["phase"], out["n_phases"], out["event_id"]) == (1, 4, event["id"])
    assert "iin_a" in out["channels"]
    assert "switch_v" in out["channels"]
    shown = await signature_of(client, event["id"])
    assert shown == out["signature"]
    assert shown["kind"] == kind, shown
    assert shown["source"] == "capture"
    assert shown["capture_id"] == out["id"]
    assert 0.25 <= shown["confidence"] <= 1.0
    assert shown["used"]
    assert all(shown["evidence"][name] is not None for name in shown["used"])
    if kind != "no_fault":  # the tripped phase is the one that collapses in the capture
        assert shown["evidence"]["collapsed_phase"] == 1.0
    fetched = await client.get(f"/v1/rails/bench-a/events/{event['id']}/capture")
    assert fetched.status_code == 200
    assert fetched.json() == out


async def test_without_input_current_and_switch_node_the_rules_say_so(
    client: httpx.AsyncClient,
) -> None:
    event = await isolation(client)
    content = upload("open_phase", iin=False, switch=False)
    answer = await post_capture(client, event["id"], content)
    shown = answer.json()["signature"]
    assert shown["kind"] == "open_phase"
    assert shown["evidence"]["input_surge_ratio"] is None
    assert "vin_dip_pct" in shown["used"]
    assert "input_surge_ratio" not in shown["used"]
    assert "no channel for drive_activity" in shown["reason"]


async def test_per_rail_thresholds_change_the_answer(client: httpx.AsyncClient) -> None:
    """A rail that asks for a drop within a sample or two of 2.5x the current (impossible)
    cannot call an open phase: its own limits are used."""
    strict = rail_spec(fault_evidence={"limits": {"phase_drop_ratio": [2.0, 2.5, 3.0]}})
    event = await isolation(client, strict)
    answer = await post_capture(client, event["id"], upload("open_phase"))
    assert answer.json()["signature"]["kind"] == "undetermined"


async def test_bad_thresholds_are_refused_naming_the_field(client: httpx.AsyncClient) -> None:
    bad = rail_spec(fault_evidence={"limits": {"vin_dip_pct": [3.0, 2.0, 5.0]}})
    answer = await client.post("/v1/rails", json=bad)
    assert answer.status_code == 422
    assert answer.json()["field"].startswith("fault_evidence.limits")
    unknown = rail_spec(fault_evidence={"limits": {"phase_wobble": [1, 2, 3]}})
    assert (await client.post("/v1/rails", json=unknown)).status_code == 422


def _pickled_npy() -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.array([{"t_s": 1}], dtype=object), allow_pickle=True)
    return buf.getvalue()


def _truncated_npy() -> bytes:
    return upload("open_phase", NPY)[:-100]


BAD_UPLOADS = [
    (b"t_s,vin_v,vout_v,i0_a\n" + b"0,12,1,20\n1,12,1,20\n" * 3, CSV, 422, "t_s"),
    (
        b"t_s,vin_v,vout_v,i0_a\n" + b"".join(b"%d,12,1,20\n" % k for k in range(5)),
        CSV,
        422,
        "body",
    ),  # one phase for a four-phase rail
    (b"t_s,vin_v,vout_v,i0_a,i1_a,i2_a,i3_a,zz\n", CSV, 422, "zz"),
    (b"t_s,vin_v,vout_v,i0_a,i1_a,i2_a,i3_a\n0,12,1,x,1,1,1\n", CSV, 422, "body"),
    (b"t_s,vin_v,vout_v,i0_a,i1_a,i2_a,i3_a\n" + b"0,12,1,nan,1,1,1\n" * 5, CSV, 422, "i0_a"),
    (_pickled_npy(), NPY, 422, "body"),
    (_truncated_npy(), NPY, 422, "body"),
    (b"PK\x03\x04 not really a zip", NPZ, 422, "body"),
    (b"{}", "application/json", 415, "content-type"),
]


@pytest.mark.parametrize(("content", "media", "status", "field"), BAD_UPLOADS)
async def test_malformed_captures_are_refused_and_nothing_changes(
    client: httpx.AsyncClient, content: bytes, media: str, status: int, field: str
) -> None:
    event = await isolation(client)
    answer = await post_capture(client, event["id"], content, media)
    assert answer.status_code == status, answer.text
    assert answer.json()["field"] == field
    assert await signature_of(client, event["id"]) == event["details"]["signature"]
    assert (await client.get(f"/v1/rails/bench-a/events/{event['id']}/capture")).status_code == 404


async def test_a_second_capture_is_a_conflict_and_keeps_the_first(
    client: httpx.AsyncClient,
) -> None:
    event = await isolation(client)
    first = await post_capture(client, event["id"], upload("open_phase"))
    second = await post_capture(client, event["id"], upload("high_side_short"))
    assert second.status_code == 409
    assert second.json()["field"] == "event_id"
    assert (await signature_of(client, event["id"]))["kind"] == first.json()["signature"]["kind"]


async def test_only_isolation_events_of_the_rail_take_a_capture(client: httpx.AsyncClient) -> None:
    event = await isolation(client)
    page = await client.get("/v1/rails/bench-a/events", params={"kind": "rail.condition"})
    other = page.json()["items"][0]["id"]
    content = upload("open_phase")
    assert (await post_capture(client, other, content)).json()["field"] == "event_id"
    assert (await post_capture(client, 10**9, content)).status_code == 404
    assert (await client.post("/v1/rails", json=rail_spec(id="bench-b"))).status_code == 201
    wrong_rail = await post_capture(client, event["id"], content, rail="bench-b")
    assert wrong_rail.status_code == 404


@pytest.fixture
def small_limit_app(make_settings: MakeSettings) -> FastAPI:
    return create_app(make_settings(max_capture_bytes=256 * 1024, max_capture_samples=1000))


async def test_too_large_captures_are_413(small_limit_app: FastAPI) -> None:
    transport = httpx.ASGITransport(app=small_limit_app)
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as client:
        event = await isolation(client)
        big = await post_capture(client, event["id"], upload("open_phase"))  # ~400 kB of CSV
        assert big.status_code == 413
        assert big.json()["field"] == "body"
        assert "exceeds the limit of 262144" in big.json()["detail"]
        cols = columns(simulate(BuckCase(fault="open_phase")), 1, switch=False)
        packed = as_npz(cols)  # noiseless: compresses under the byte limit, 2001 samples inside
        assert len(packed) < 256 * 1024
        many = await post_capture(client, event["id"], packed, NPZ)
        assert many.status_code == 413, many.text
        assert "2001 samples exceed the limit of 1000" in many.json()["detail"]
        assert (await signature_of(client, event["id"]))["source"] == "samples"
    close(small_limit_app)


@pytest.fixture
def keyed_app(make_settings: MakeSettings) -> FastAPI:
    return create_app(make_settings(auth_mode="keys"))


def key(app: FastAPI, role: str, rails: list[str] | None = None) -> dict[str, str]:
    _, plain = access.create(app.state.sessions, name=f"{role} test", role=role, rails=rails)
    return {"authorization": f"Bearer {plain}"}


async def test_access_follows_the_rail_and_role(keyed_app: FastAPI) -> None:
    transport = httpx.ASGITransport(app=keyed_app)
    admin = key(keyed_app, "admin")
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test",
                                 headers=admin) as client:  # fmt: skip
        event = await isolation(client)
        assert (await client.post("/v1/rails", json=rail_spec(id="bench-b"))).status_code == 201
    url = f"/v1/rails/bench-a/events/{event['id']}/capture"
    content, media = upload("open_phase"), {"content-type": CSV}
    async with httpx.AsyncClient(transport=transport, base_url="http://phaseward.test") as anon:
        assert (await anon.post(url, content=content, headers=media)).status_code == 401
        reader = key(keyed_app, "read")
        assert (await anon.post(url, content=content, headers=media | reader)).status_code == 403
        elsewhere = key(keyed_app, "ingest", ["bench-b"])
        refused = await anon.post(url, content=content, headers=media | elsewhere)
        assert refused.status_code == 403
        assert refused.json()["field"] == "rail_id"
        rack = key(keyed_app, "ingest", ["bench-a"])
        assert (await anon.post(url, content=content, headers=media | rack)).status_code == 201
        assert (await anon.get(url, headers=reader)).status_code == 200
        assert (await anon.get(url, headers=key(keyed_app, "read", ["bench-b"]))).status_code == 403
    close(keyed_app)


def test_definition_names_the_classifiers_features() -> None:
    assert set(get_args(FeatureName)) == set(FEATURES)
