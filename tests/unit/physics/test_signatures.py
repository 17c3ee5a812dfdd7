"""Unit tests for phaseward.physics.signatures on hand-built captures with features worked out
by hand: a 4-phase rail at 80 A (20 A in phase 0), 12 V in, 1.0 V out, 500 kHz, L = 220 nH,
sampled at 20 MSa/s (40 samples a period), trigger at t = 0."""

from dataclasses import dataclass, replace

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from tests.buck_sim import BuckCase, simulate

from phaseward.physics.signatures import (
    DEFAULT_LIMITS,
    EvidenceRules,
    Signature,
    classify_capture,
    too_slow,
)

F64 = npt.NDArray[np.float64]
T = np.arange(-800, 400) * 50e-9  # 40 us before the trigger, 20 us after
N = T.size
OPENS = -1e-6  # the phase's current path opens here (in the event window: t >= -20 us)
DEFAULTS = EvidenceRules()


@dataclass(frozen=True)
class Capture:
    current_a: F64
    vin_v: F64
    vout_v: F64
    iin_a: F64 | None
    drive_v: F64 | None

    def classify(self, rules: EvidenceRules = DEFAULTS, **changes: object) -> Signature:
        args: dict[str, object] = {
            "phase": 0, "vin_nominal_v": 12.0, "vout_nominal_v": 1.0, "fsw_hz": 500e3,
            "inductance_h": 220e-9, "iin_a": self.iin_a, "drive_v": self.drive_v, "rules": rules,
        } | changes  # fmt: skip
        return classify_capture(T, self.current_a, self.vin_v, self.vout_v, **args)  # type: ignore[arg-type]


def open_phase() -> Capture:
    """Phase 0 carries a flat 20 A and drops to 0 at OPENS; the others take it over; the gate
    keeps switching (a square wave of 40 samples)."""
    current = np.full((N, 4), 20.0)
    current[T >= OPENS, 0] = 0.0
    current[T >= OPENS, 1:] = 80.0 / 3.0
    gate = 5.0 * ((np.arange(N) % 40) < 4)
    return Capture(current, np.full(N, 12.0), np.full(N, 1.0), np.full(N, 80.0 / 12.0), gate)


def test_open_phase_features_by_hand() -> None:
    sig = open_phase().classify()
    assert sig.kind == "open_phase"
    ev = sig.evidence
    assert ev["phase_drop_ratio"] == pytest.approx(1.0)  # 20 A within 3 samples / 20 A
    assert ev["phase_remaining_ratio"] == 0.0
    assert ev["phase_rise_ratio"] == pytest.approx(0.0, abs=1e-12)
    assert ev["phase_reversal_ratio"] == 0.0
    assert ev["input_surge_ratio"] == pytest.approx(1.0)
    assert ev["vin_dip_pct"] == pytest.approx(0.0, abs=1e-12)
    assert ev["drive_activity"] == 1.0
    assert ev["samples_per_period"] == pytest.approx(40.0)
    assert ev["baseline_periods"] == pytest.approx(10.0)  # 400 samples = 20 us
    assert ev["collapsed_phase"] == 0.0
    assert sig.confidence == 1.0
    assert sig.used == (
        "input_surge_ratio", "phase_rise_ratio", "phase_reversal_ratio",
        "phase_remaining_ratio", "phase_drop_ratio", "drive_activity",
    )  # fmt: skip


def test_gate_drive_loss_ramps_down_and_stops_switching() -> None:
    """Freewheeling through the body diode: 20 A falls at (1.0 + 0.7) V / 220 nH = 7.7 A/us,
    0.39 A per sample, to zero in 2.6 us; the gate stays low."""
    base = open_phase()
    ramp = np.clip(20.0 - (T - OPENS) * (1.7 / 220e-9), 0.0, 20.0)
    current = base.current_a.copy()
    current[:, 0] = np.where(T >= OPENS, ramp, 20.0)
    gate = np.where(T >= OPENS, 0.0, base.drive_v)  # type: ignore[arg-type]
    sig = replace(base, current_a=current, drive_v=gate).classify()
    assert sig.kind == "gate_drive_loss", sig.reason
    # 3-sample means fall by 3 x 0.386 A within three samples: 1.159 / 20
    assert sig.evidence["phase_drop_ratio"] == pytest.approx(3 * 1.7 / 220e-9 * 50e-9 / 20.0)
    assert sig.evidence["drive_activity"] == 0.0


def test_high_side_short_surges_and_rises() -> None:
    base = open_phase()
    fault = (T >= -4e-6) & (T < 0.0)
    current = base.current_a.copy()
    current[:, 0] = np.where(fault, 20.0 + (T + 4e-6) * 15e6, current[:, 0])  # +60 A in 4 us
    iin = np.where(fault, 60.0, 80.0 / 12.0)
    vin = np.where(fault, 11.4, 12.0)  # 5 % dip
    sig = replace(base, current_a=current, iin_a=iin, vin_v=vin).classify()
    assert sig.kind == "high_side_short", sig.reason
    assert sig.evidence["input_surge_ratio"] == pytest.approx(60.0 / (80.0 / 12.0))
    assert sig.evidence["vin_dip_pct"] == pytest.approx(5.0)
    # a 4 us box seen through a one-period mean stays below half its depth for 4 us
    assert sig.evidence["vin_dip_duration_s"] == pytest.approx(4e-6, abs=50e-9)


def test_low_side_short_reverses() -> None:
    base = open_phase()
    fault = (T >= -4e-6) & (T < 0.5e-6)
    current = base.current_a.copy()
    current[:, 0] = np.where(fault, 20.0 - (T + 4e-6) * 6e6, current[:, 0])  # to -7 A
    iin = np.where(fault & (T < 0.0), 40.0, 80.0 / 12.0)
    sig = replace(base, current_a=current, iin_a=iin).classify()
    assert sig.kind == "low_side_short", sig.reason
    assert sig.evidence["phase_reversal_ratio"] > 0.25  # about -6 A (8-sample mean) of 20 A


def test_no_fault_keeps_the_current() -> None:
    base = open_phase()
    current = np.full((N, 4), 20.0)
    sig = replace(base, current_a=current).classify()
    assert sig.kind == "no_fault"
    assert sig.evidence["phase_remaining_ratio"] == 1.0


def test_missing_channels_are_left_out_and_named() -> None:
    sig = replace(open_phase(), iin_a=None, drive_v=None).classify()
    assert sig.kind == "open_phase"
    assert np.isnan(sig.evidence["input_surge_ratio"])
    assert "vin_dip_pct" in sig.used
    assert "drive_activity" not in sig.used
    assert "no channel for drive_activity" in sig.reason


def test_rail_limits_are_used() -> None:
    strict = EvidenceRules(limits={"phase_drop_ratio": (1.5, 2.0, 3.0)})
    assert strict.limits["vin_dip_pct"] == DEFAULT_LIMITS["vin_dip_pct"]  # the rest default
    sig = open_phase().classify(strict)
    assert sig.kind == "undetermined"
    assert sig.scores["open_phase"] < 0.0


@pytest.mark.parametrize(
    ("limits", "message"),
    [({"wobble": (1.0, 2.0, 3.0)}, "unknown feature"),
     ({"vin_dip_pct": (2.0, 1.0, 3.0)}, "quiet < edge < clear")],
)  # fmt: skip
def test_bad_limits_raise(limits: dict[str, tuple[float, float, float]], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        EvidenceRules(limits=limits)


def test_a_slow_capture_is_undetermined() -> None:
    sig = open_phase().classify(fsw_hz=5e6)  # 4 samples per period
    assert sig.kind == "undetermined"
    assert "4 samples per switching period" in sig.reason


def test_samples_alone_are_too_slow() -> None:
    sig = too_slow(0.5)
    assert (sig.kind, sig.confidence) == ("undetermined", 0.0)
    assert sig.reason == "one sample per 0.5 s is slower than the event; attach a capture"


def test_a_quiet_phase_is_undetermined() -> None:
    base = open_phase()
    current = base.current_a.copy()
    current[:, 0] *= 0.001  # 0.02 A of 60 A
    sig = replace(base, current_a=current).classify()
    assert sig.kind == "undetermined"
    assert "too quiet" in sig.reason


def test_a_capture_without_pretrigger_is_undetermined() -> None:
    sig = open_phase().classify()
    late = classify_capture(
        T + 1e-3, open_phase().current_a, np.full(N, 12.0), np.full(N, 1.0), phase=0,
        vin_nominal_v=12.0, vout_nominal_v=1.0, fsw_hz=500e3, inductance_h=220e-9,
    )  # fmt: skip
    assert sig.kind == "open_phase"
    assert late.kind == "undetermined"
    assert "from the trigger" in late.reason


def test_validation_names_the_argument() -> None:
    good = open_phase()
    with pytest.raises(ValueError, match="t_s"):
        classify_capture(T[::-1], good.current_a, good.vin_v, good.vout_v, phase=0,
                         vin_nominal_v=12.0, vout_nominal_v=1.0, fsw_hz=500e3,
                         inductance_h=220e-9)  # fmt: skip
    with pytest.raises(ValueError, match="current_a"):
        classify_capture(
            T, good.current_a[:-1], good.vin_v, good.vout_v, phase=0, vin_nominal_v=12.0,
            vout_nominal_v=1.0, fsw_hz=500e3, inductance_h=220e-9,
        )  # fmt: skip
    with pytest.raises(ValueError, match="phase"):
        good.classify(phase=4)
    with pytest.raises(ValueError, match="iin_a"):
        good.classify(iin_a=np.full(N, np.nan))
    with pytest.raises(ValueError, match="inductance_h"):
        good.classify(inductance_h=0.0)


SIMULATED = simulate(BuckCase(fault="low_side_short", noise=0.02, seed=3))


@settings(deadline=None)  # numeric work, timed only in bench/
@given(st.floats(min_value=0.05, max_value=20.0), st.floats(min_value=0.2, max_value=5.0))
def test_same_answer_in_other_units(amps: float, volts: float) -> None:
    """Scaling every current by a and every voltage by v (with L scaled by v / a, which keeps
    the ripple in the same proportion) changes no ratio, so neither the class nor its score."""
    c = SIMULATED

    def run(a: float, v: float) -> Signature:
        return classify_capture(
            c.t_s, c.current_a * a, c.vin_v * v, c.vout_v * v, phase=0, vin_nominal_v=12.0 * v,
            vout_nominal_v=1.0 * v, fsw_hz=500e3, inductance_h=220e-9 * v / a,
            iin_a=c.iin_a * a, drive_v=c.switch_v[:, 0] * v,
        )  # fmt: skip

    reference, scaled = run(1.0, 1.0), run(amps, volts)
    assert reference.kind == "low_side_short"
    assert scaled.kind == reference.kind
    assert scaled.confidence == pytest.approx(reference.confidence, rel=1e-6, abs=1e-9)


def test_the_phase_that_collapses_is_named_when_it_is_another() -> None:
    sig = open_phase().classify(phase=2)  # phase 0 is the one whose current falls
    assert sig.evidence["collapsed_phase"] == 0.0
    assert sig.reason.endswith("; phase 0, not 2, collapses most in the capture")
    assert "collapses" not in open_phase().classify().reason
