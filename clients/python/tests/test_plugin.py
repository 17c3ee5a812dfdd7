"""The pytest plugin, run by pytester against the real service."""

from __future__ import annotations

import importlib.metadata
import textwrap
import time

import pytest

from phaseward_client import Client
from support import new_rail_id, rail_definition, sample

RACK_HELPERS = """
import time

import pytest

from phaseward_client import PhaseReading, Sample

_last = [0.0]


def reading(currents, tripped=None):
    _last[0] = max(time.time(), _last[0] + 0.001)
    phases = [
        PhaseReading(i, current_a=c, temp_c=60.0, breaker_tripped=(i == tripped))
        for i, c in enumerate(currents)
    ]
    return Sample(time=_last[0], vin_v=12.0, vout_v=1.0, phases=phases)


def even(recorder, n=3, each=20.0):
    for _ in range(n):
        recorder.send(reading([each] * 4))


def overload(recorder):
    even(recorder, 2)
    recorder.send(reading([0.0, 31.7, 31.7, 31.7], tripped=0))  # 95 A on three 30 A phases
"""


def test_the_plugin_is_registered_by_entry_point() -> None:
    points = importlib.metadata.entry_points(group="pytest11", name="phaseward")
    assert [p.value for p in points] == ["phaseward_client.pytest_plugin"]


def test_rack_tests_fail_on_overload_and_chosen_kinds(
    pytester: pytest.Pytester, client: Client, service_url: str
) -> None:
    names = ("nominal", "overload", "isolated", "allowed", "own", "teardown", "pre")
    rails = {name: new_rail_id(name[:4]) for name in names}
    for rid in rails.values():
        client.create_rail(rail_definition(rid))
    # The "pre" rail went overloaded before the session: that must not fail a later test.
    t0 = time.time() - 10.0  # before the rack's samples, which carry the wall clock
    client.post_samples(rails["pre"], [sample(k, [20.0] * 4, t0=t0) for k in range(2)])
    before = client.post_sample(rails["pre"], sample(2, [0.0, 31.7, 31.7, 31.7], t0=t0, tripped=0))
    assert before.condition == "overloaded"

    pytester.makeini(
        f"""
        [pytest]
        phaseward_url = {service_url}
        phaseward_rail = {rails["nominal"]}
        phaseward_max_delay_s = 0.05
        """
    )
    tests = f"""
        @pytest.fixture
        def ramp_down(phaseward_rail):
            yield phaseward_rail
            overload(phaseward_rail)  # samples sent while tearing down are judged too


        def test_nominal(phaseward_rail, phaseward_client):
            even(phaseward_rail)
            assert phaseward_rail.status().condition == "nominal"
            rail = phaseward_client.get_rail(phaseward_rail.rail_id)
            assert rail.spec["phase_count"] == 4
            assert [e.kind for e in phaseward_rail.events()] == ["rail.condition"]


        @pytest.mark.phaseward(rail="{rails["overload"]}")
        def test_overload(phaseward_rail):
            overload(phaseward_rail)


        @pytest.mark.phaseward(rail="{rails["isolated"]}", fail_on=["phase.isolated"])
        def test_isolated(phaseward_rail):
            even(phaseward_rail, 2)
            phaseward_rail.send(reading([0.0, 20.0, 20.0, 20.0], tripped=0))
            assert phaseward_rail.status().condition == "degraded"


        @pytest.mark.phaseward(rail="{rails["allowed"]}", fail_on_overload=False)
        def test_overload_allowed(phaseward_rail):
            overload(phaseward_rail)
            kinds = [e.kind for e in phaseward_rail.events()]
            assert "capacity.short" in kinds


        @pytest.mark.phaseward(rail="{rails["own"]}")
        def test_own_failure(phaseward_rail):
            overload(phaseward_rail)
            assert False, "the rack said no"


        @pytest.mark.phaseward(rail="{rails["teardown"]}")
        def test_teardown(ramp_down):
            even(ramp_down)


        @pytest.mark.phaseward(rail="{rails["pre"]}")
        def test_earlier_overload_does_not_count(phaseward_rail):
            even(phaseward_rail)
            assert phaseward_rail.status().condition == "nominal"
    """
    pytester.makepyfile(test_rack=RACK_HELPERS + textwrap.dedent(tests))
    result = pytester.runpytest("-p", "no:cacheprovider", "-rA")
    result.assert_outcomes(passed=4, failed=3, errors=1)
    text = result.stdout.str()
    result.stdout.fnmatch_lines(
        [
            "PASSED test_rack.py::test_nominal",
            "PASSED test_rack.py::test_overload_allowed",
            "PASSED test_rack.py::test_teardown",
            "PASSED test_rack.py::test_earlier_overload_does_not_count",
            "ERROR test_rack.py::test_teardown - *",
            "FAILED test_rack.py::test_overload - *",
            "FAILED test_rack.py::test_isolated - *",
            "FAILED test_rack.py::test_own_failure - AssertionError: the rack said no*",
        ],
        consecutive=False,
    )
    assert f"phaseward: rail '{rails['overload']}' during this test:" in text
    assert "the rail went overloaded: #" in text
    assert "phase.isolated: #" in text
    assert f"phaseward: rail '{rails['teardown']}'" in text
    assert "Captured phaseward call" in text  # the events are shown for a failing test
    # The rails really did what the verdicts say.
    assert client.status(rails["overload"]).condition == "overloaded"
    assert client.status(rails["isolated"]).condition == "degraded"
    assert client.status(rails["pre"]).condition == "nominal"


def test_command_line_options_and_setup_errors(
    pytester: pytest.Pytester, client: Client, service_url: str
) -> None:
    rid = new_rail_id("cli")
    client.create_rail(rail_definition(rid))
    missing = new_rail_id("none")
    tests = f"""
        def test_first_sample(phaseward_rail):
            phaseward_rail.send(reading([20.0] * 4))


        @pytest.mark.phaseward(rail="{missing}")
        def test_unknown_rail(phaseward_rail):
            pass
    """
    pytester.makepyfile(test_cli=RACK_HELPERS + textwrap.dedent(tests))
    result = pytester.runpytest(
        "-p", "no:cacheprovider", f"--phaseward-url={service_url}", f"--phaseward-rail={rid}",
        "--phaseward-fail-on=rail.condition",
    )  # fmt: skip
    # The first sample of a new rail raises rail.condition (new -> nominal), chosen to fail.
    result.assert_outcomes(failed=1, errors=1)
    result.stdout.fnmatch_lines(
        [f"*{missing}*not_found*", "  - rail.condition: #*rail new -> nominal"]
    )

    unconfigured = pytester.runpytest("-p", "no:cacheprovider", "-k", "first_sample")
    unconfigured.assert_outcomes(errors=1, deselected=1)
    unconfigured.stdout.fnmatch_lines(["*needs --phaseward-url*"])
