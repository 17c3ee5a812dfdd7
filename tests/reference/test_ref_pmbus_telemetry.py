"""Reference: PMBus Power System Management Protocol Specification, Part II: READ_VIN,
READ_IIN and READ_TEMPERATURE_1 are LINEAR11 (bits 15..11 = N, 5-bit two's complement; bits
10..0 = Y, 11-bit two's complement; value = Y * 2**N), READ_VOUT is LINEAR16 (value = V * 2**N,
N from VOUT_MODE bits 4..0); STATUS_IOUT bit 7 = IOUT_OC_FAULT, bit 5 = IOUT_OC_WARNING;
STATUS_TEMPERATURE bit 7 = OT_FAULT, bit 6 = OT_WARNING, bit 4 = UT_FAULT; STATUS_INPUT bit 3 =
unit off for low input voltage, bit 2 = IIN_OC_FAULT, bit 1 = IIN_OC_WARNING; STATUS_VOUT
bit 7 = VOUT_OV_FAULT, bit 6 = VOUT_OV_WARNING, bit 5 = VOUT_UV_WARNING, bit 4 = VOUT_UV_FAULT,
bit 2 = TON_MAX_FAULT (bit positions from memory, as in physics/pmbus.py). Every word below is
worked out by hand from those definitions and decoded the way ingest does (schema ->
monitor.telemetry.to_batch).
"""

from typing import Any

import numpy as np
import pytest
from tests.factories import rail_spec

from phaseward.api.schemas.rails import RailCreate
from phaseward.api.schemas.samples import SAMPLES, to_incoming
from phaseward.errors import InvalidInput
from phaseward.monitor import rail_model
from phaseward.monitor.telemetry import (
    FLAG_DRIVER_OFF,
    FLAG_OVERCURRENT,
    FLAG_OVERTEMP,
    FLAG_VOUT_FAULT,
    SampleBatch,
    to_batch,
)
from phaseward.physics.pmbus import decode_status_vout

VIN_12 = 0xD300  # N = 11010b = -6, Y = 0x300 = 768 -> 768 / 64 = 12.0 V
VIN_11_984 = 0xD2FF  # Y = 767 -> 11.984375 V
IIN_1_5 = 0xC8C0  # N = 11001b = -7, Y = 0x0C0 = 192 -> 192 / 128 = 1.5 A
VOUT_0_8 = 0x019A  # LINEAR16, VOUT_MODE 0x17 (N = 10111b = -9): 410 / 512 = 0.80078125 V
TEMP_42_25 = 0xE2A4  # N = 11100b = -4, Y = 0x2A4 = 676 -> 42.25 degC
TEMP_MINUS_1 = 0xE7F0  # N = -4, Y = 0x7F0 = 2032 - 2048 = -16 -> -1.0 degC


def batch(phases: list[dict[str, Any]], vout_mode: int | None = 0x17, **sample: Any) -> SampleBatch:
    spec = RailCreate.model_validate(rail_spec(vout_mode=vout_mode)).stored()
    model = rail_model.build("bench-a", 1, spec)
    body = {"time": 1.8e9, "seq": 0, "phases": phases} | sample
    return to_batch(to_incoming(SAMPLES.validate_python([body])), model)


def words(k: int, **extra: Any) -> dict[str, Any]:
    return {"index": k, "current_a": 20.0, "read_vin": VIN_12 if k % 2 else VIN_11_984,
            "read_vout": VOUT_0_8, "read_iin": IIN_1_5} | extra  # fmt: skip


def test_voltages_and_input_current_from_the_phases_words() -> None:
    b = batch([words(k) for k in range(4)])
    assert b.vin_v[0] == pytest.approx((12.0 + 11.984375) / 2)  # the mean over the phases
    assert b.vout_v[0] == 410 / 512
    assert b.iin_a[0] == 4 * 1.5  # the sum over the phases


def test_given_values_win_over_words() -> None:
    b = batch([words(k) for k in range(4)], vin_v=12.1, vout_v=1.0, iin_a=7.0)
    assert (b.vin_v[0], b.vout_v[0], b.iin_a[0]) == (12.1, 1.0, 7.0)


def test_input_current_needs_every_phase_word() -> None:
    phases = [words(k) for k in range(4)]
    del phases[2]["read_iin"]
    assert np.isnan(batch(phases).iin_a[0])


def test_temperature_words() -> None:
    phases = [words(0, read_temperature_1=TEMP_42_25), words(1, read_temperature_1=TEMP_MINUS_1),
              words(2, temp_c=50.0), words(3)]  # fmt: skip
    temps = batch(phases).temp_c[0]
    assert temps[:3].tolist() == [42.25, -1.0, 50.0]
    assert np.isnan(temps[3])


def test_status_bytes_set_flags() -> None:
    phases = [words(0, status_iout=0x80), words(1, status_iout=0x20),
              words(2, status_temperature=0x40), words(3, status_temperature=0x10)]  # fmt: skip
    flags = batch(phases).flags[0].tolist()
    assert flags == [FLAG_OVERCURRENT, 0, FLAG_OVERTEMP, 0]


def test_status_input_sets_flags() -> None:
    phases = [words(0, status_input=0x04), words(1, status_input=0x02),
              words(2, status_input=0x08), words(3, status_input=0x00)]  # fmt: skip
    flags = batch(phases).flags[0].tolist()
    assert flags == [FLAG_OVERCURRENT, 0, FLAG_DRIVER_OFF, 0]


def test_status_vout_faults_set_the_vout_fault_flag_only() -> None:
    """0x80 = bit 7 (OV fault), 0x10 = bit 4 (UV fault), 0x60 = bits 6 and 5 (the two
    warnings), 0x04 = bit 2 (TON_MAX fault: not an output voltage outside its limits)."""
    phases = [words(0, status_vout=0x80), words(1, status_vout=0x10),
              words(2, status_vout=0x60), words(3, status_vout=0x04)]  # fmt: skip
    flags = batch(phases).flags[0].tolist()
    assert flags == [FLAG_VOUT_FAULT, FLAG_VOUT_FAULT, 0, 0]
    assert decode_status_vout(0x60) == {"VOUT_OV_WARNING", "VOUT_UV_WARNING"}
    assert decode_status_vout(0x04) == {"TON_MAX_FAULT"}


def test_read_vout_needs_the_rails_vout_mode() -> None:
    with pytest.raises(InvalidInput) as err:
        batch([words(k) for k in range(4)], vout_mode=None)
    assert err.value.field == "[0].phases[0].read_vout"


def test_a_sample_without_vin_needs_every_phases_word() -> None:
    phases = [words(k) for k in range(4)]
    del phases[1]["read_vin"]
    with pytest.raises(InvalidInput, match="give vin_v or read_vin on every phase") as err:
        batch(phases)
    assert err.value.field == "[0].vin_v"


def test_a_negative_input_word_is_refused_naming_it() -> None:
    phases = [words(k) for k in range(4)]
    phases[3]["read_iin"] = 0xCFC0  # N = -7, Y = 0x7C0 = 1984 - 2048 = -64 -> -0.5 A
    with pytest.raises(InvalidInput, match=r"read_iin decodes to -0\.5") as err:
        batch(phases)
    assert err.value.field == "[0].phases[3].read_iin"
