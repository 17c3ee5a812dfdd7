"""Unit tests for phaseward.physics.signatures (fault class from samples around an isolation).

The traces are synthetic: a 4-phase rail at 80 A (20 A in the phase that fails, 60 A in the
others), 12 V in, 1.0 V out, one sample per millisecond, isolation seen at sample 10.
"""

from dataclasses import dataclass, replace

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.signatures import Signature, classify_isolation

FloatArray = npt.NDArray[np.float64]
N, EVENT = 20, 10
VIN, VOUT = 12.0, 1.0


@dataclass(frozen=True)
class Trace:
    t_s: FloatArray
    vin_v: FloatArray
    vout_v: FloatArray
    phase_a: FloatArray
    others_a: FloatArray
    iin_a: FloatArray | None

    def classify(self, event_index: int = EVENT) -> Signature:
        return classify_isolation(
            self.t_s,
            self.vin_v,
            self.vout_v,
            self.phase_a,
            self.others_a,
            event_index,
            vin_nominal_v=VIN,
            vout_nominal_v=VOUT,
            iin_a=self.iin_a,
        )


def quiet() -> Trace:
    """Undisturbed rail; the phase collapses to 0 A after the event and the others take 80 A."""
    phase = np.full(N, 20.0)
    phase[EVENT + 1 :] = 0.0
    others = np.full(N, 60.0)
    others[EVENT + 1 :] = 80.0
    return Trace(
        t_s=np.linspace(0.0, (N - 1) * 1e-3, N),
        vin_v=np.full(N, VIN),
        vout_v=np.full(N, VOUT),
        phase_a=phase,
        others_a=others,
        iin_a=np.full(N, 80.0 * VOUT / VIN / 0.9),
    )


def at(values: FloatArray, index: slice | int, value: float) -> FloatArray:
    out = values.copy()
    out[index] = value
    return out


def high_side_short(*, with_iin: bool = True) -> Trace:
    base = quiet()
    assert base.iin_a is not None
    return replace(
        base,
        vin_v=at(base.vin_v, slice(9, 11), 11.0),  # 8.3 % sag
        vout_v=at(base.vout_v, slice(9, 11), 1.06),  # 6 % overshoot
        phase_a=at(base.phase_a, slice(9, 11), 45.0),  # 2.25 x spike
        iin_a=at(base.iin_a, slice(9, 11), 30.0) if with_iin else None,  # about 4 x surge
    )


def low_side_short() -> Trace:
    base = quiet()
    return replace(
        base,
        vin_v=at(base.vin_v, slice(9, 11), 11.2),  # 6.7 % sag
        vout_v=at(base.vout_v, slice(9, 12), 0.85),  # 15 % dip
        phase_a=at(base.phase_a, slice(9, 11), -30.0),  # the phase sinks current
    )


def open_phase() -> Trace:
    base = quiet()
    return replace(base, vout_v=at(base.vout_v, 11, 0.99))  # 1 % undershoot as it drops out


# --- the three classes ----------------------------------------------------------------------


def test_high_side_short() -> None:
    sig = high_side_short().classify()
    assert sig.kind == "high_side_short"
    ev = sig.evidence
    assert ev["vin_sag_pct"] == pytest.approx(100.0 / 12.0)
    assert ev["vout_overshoot_pct"] == pytest.approx(6.0)
    assert ev["input_surge_ratio"] == pytest.approx(30.0 / (80.0 / 12.0 / 0.9))
    assert ev["surge_from_input_current"] == 1.0
    assert ev["phase_spike_ratio"] == pytest.approx(2.25)
    # weakest rule: overshoot (6 - 3) / (8 - 3)
    assert sig.confidence == pytest.approx(0.6)
    assert sig.scores["high_side_short"] == pytest.approx(0.6)


def test_high_side_short_without_input_current_uses_the_phase_spike() -> None:
    sig = high_side_short(with_iin=False).classify()
    assert sig.kind == "high_side_short"
    assert sig.evidence["surge_from_input_current"] == 0.0
    assert sig.evidence["input_surge_ratio"] == sig.evidence["phase_spike_ratio"] == 2.25
    assert sig.confidence == pytest.approx(0.5)  # spike (2.25 - 1.5) / (3 - 1.5)


def test_high_side_short_with_idle_input_current_falls_back_to_the_spike() -> None:
    trace = replace(high_side_short(), iin_a=np.zeros(N))
    sig = trace.classify()
    assert sig.evidence["surge_from_input_current"] == 0.0
    assert sig.kind == "high_side_short"


def test_low_side_short() -> None:
    sig = low_side_short().classify()
    assert sig.kind == "low_side_short"
    assert sig.evidence["vout_dip_pct"] == pytest.approx(15.0)
    assert sig.evidence["vout_overshoot_pct"] == pytest.approx(0.0)
    assert sig.confidence == pytest.approx((100.0 * 0.8 / 12.0 - 3.0) / 7.0)  # the sag rule


def test_open_phase() -> None:
    sig = open_phase().classify()
    assert sig.kind == "open_phase"
    assert sig.confidence == 1.0
    assert sig.evidence["others_pickup_ratio"] == pytest.approx(1.0)
    assert sig.evidence["phase_remaining_ratio"] == 0.0
    assert sig.evidence["vout_dip_pct"] == pytest.approx(1.0)


def test_classes_exclude_each_other() -> None:
    for trace in (high_side_short(), low_side_short(), open_phase()):
        sig = trace.classify()
        assert sum(score > 0.0 for score in sig.scores.values()) == 1
        assert sig.kind in sig.reason


# --- undetermined ---------------------------------------------------------------------------


def test_one_sample_is_undetermined() -> None:
    sig = classify_isolation(
        [0.0], [12.0], [1.0], [20.0], [60.0], 0, vin_nominal_v=VIN, vout_nominal_v=VOUT
    )
    assert (sig.kind, sig.confidence, sig.scores) == ("undetermined", 0.0, {})
    assert sig.evidence == {"samples_before": 0.0, "samples_after": 0.0}


@pytest.mark.parametrize(("event", "before", "after"), [(4, 2, 13), (16, 14, 1)])
def test_too_few_samples_around_the_event(event: int, before: int, after: int) -> None:
    sig = open_phase().classify(event)
    assert sig.kind == "undetermined"
    assert sig.evidence["samples_before"] == before
    assert sig.evidence["samples_after"] == after
    assert "baseline" in sig.reason


def test_marginal_sag_dip_and_spike_are_undetermined() -> None:
    base = quiet()
    sig = replace(
        base,
        vin_v=at(base.vin_v, 10, VIN * (1.0 - 0.033)),  # 3.3 % sag
        vout_v=at(base.vout_v, 10, VOUT * (1.0 - 0.053)),  # 5.3 % dip
        phase_a=at(base.phase_a, 10, 32.0),  # 1.6 x spike
    ).classify()
    assert sig.kind == "undetermined"
    assert sig.confidence == 0.0
    assert "marginal" in sig.reason
    assert 0.0 < sig.scores["low_side_short"] < 0.25


def test_conflicting_overshoot_and_dip_are_undetermined() -> None:
    trace = high_side_short()
    sig = replace(trace, vout_v=at(trace.vout_v, 11, 0.85)).classify()
    assert sig.kind == "undetermined"
    assert all(score <= 0.0 for score in sig.scores.values())
    assert "conflict" in sig.reason


def test_a_phase_that_keeps_conducting_fits_no_class() -> None:
    base = quiet()
    sig = replace(base, phase_a=np.full(N, 20.0)).classify()
    assert sig.kind == "undetermined"
    assert sig.evidence["phase_remaining_ratio"] == 1.0


def test_a_quiet_phase_is_undetermined() -> None:
    base = quiet()
    sig = replace(base, phase_a=base.phase_a * 0.01).classify()
    assert sig.kind == "undetermined"
    assert sig.evidence["phase_share"] == pytest.approx(0.2 / 60.2)
    assert "rail current" in sig.reason
    reversed_phase = replace(base, phase_a=-base.phase_a).classify()  # sinking before the event
    assert (reversed_phase.kind, reversed_phase.evidence["phase_share"]) == ("undetermined", -0.5)
    idle = replace(base, phase_a=base.phase_a * 0.0, others_a=base.others_a * 0.0).classify()
    assert (idle.kind, idle.evidence["phase_share"]) == ("undetermined", 0.0)


def test_a_gap_in_the_samples_is_undetermined() -> None:
    base = open_phase()
    t = base.t_s.copy()
    t[EVENT:] += 0.01  # a 10 ms hole in 1 ms telemetry
    sig = replace(base, t_s=t).classify()
    assert sig.kind == "undetermined"
    assert sig.evidence["window_gap_ratio"] == pytest.approx(11.0)
    assert "gap" in sig.reason


# --- properties -----------------------------------------------------------------------------

TRACES = {"high": high_side_short(), "low": low_side_short(), "open": open_phase()}


@given(
    which=st.sampled_from(sorted(TRACES)),
    current_scale=st.floats(min_value=0.01, max_value=100.0),
    time_scale=st.floats(min_value=1e-3, max_value=1e3),
    time_shift=st.floats(min_value=-1e3, max_value=1e3),
)
def test_invariant_under_current_and_time_units(
    which: str, current_scale: float, time_scale: float, time_shift: float
) -> None:
    trace = TRACES[which]
    assert trace.iin_a is not None
    scaled = replace(
        trace,
        t_s=trace.t_s * time_scale + time_shift,
        phase_a=trace.phase_a * current_scale,
        others_a=trace.others_a * current_scale,
        iin_a=trace.iin_a * current_scale,
    )
    before, after = trace.classify(), scaled.classify()
    assert after.kind == before.kind
    assert after.confidence == pytest.approx(before.confidence, rel=1e-9)


@given(dips=st.lists(st.floats(min_value=0.0, max_value=0.5), min_size=2, max_size=2))
def test_deeper_dip_never_weakens_a_low_side_short(dips: list[float]) -> None:
    base = low_side_short()
    shallow, deep = sorted(dips)
    scores = [
        replace(base, vout_v=at(base.vout_v, slice(9, 12), VOUT * (1.0 - d))).classify().scores
        for d in (shallow, deep)
    ]
    assert scores[1]["low_side_short"] >= scores[0]["low_side_short"]


# --- validation -----------------------------------------------------------------------------


def _classify(
    arrays: list[FloatArray],
    event_index: int = EVENT,
    *,
    vin_nominal_v: float = VIN,
    vout_nominal_v: float = VOUT,
    iin_a: npt.ArrayLike | None = None,
) -> Signature:
    t, vin, vout, phase, others = arrays
    return classify_isolation(
        t,
        vin,
        vout,
        phase,
        others,
        event_index,
        vin_nominal_v=vin_nominal_v,
        vout_nominal_v=vout_nominal_v,
        iin_a=iin_a,
    )


def test_validation_names_the_argument() -> None:
    tr = open_phase()
    args = [tr.t_s, tr.vin_v, tr.vout_v, tr.phase_a, tr.others_a]
    names = ("t_s", "vin_v", "vout_v", "phase_current_a", "others_current_a")
    for i, name in enumerate(names):
        bad = list(args)
        bad[i] = np.append(args[i], 1.0) if i else np.array([[0.0]])
        with pytest.raises(ValueError, match=name):
            _classify(bad)
        bad[i] = at(args[i], 3, np.nan)
        with pytest.raises(ValueError, match=name):
            _classify(bad)
    with pytest.raises(ValueError, match="increasing"):
        _classify([at(tr.t_s, 5, 0.0), *args[1:]])
    with pytest.raises(ValueError, match="iin_a"):
        _classify(args, iin_a=[1.0])
    for event in (-1, N, True):
        with pytest.raises(ValueError, match="event_index"):
            _classify(args, event)
    with pytest.raises(ValueError, match="event_index"):
        _classify(args, 2.0)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="vin_nominal_v"):
        _classify(args, vin_nominal_v=0.0)
    with pytest.raises(ValueError, match="vout_nominal_v"):
        _classify(args, vout_nominal_v=np.nan)


def test_accepts_a_numpy_integer_event_index() -> None:
    assert open_phase().classify(np.int64(EVENT)).kind == "open_phase"  # type: ignore[arg-type]
