"""Reference: PMBus Power System Management Protocol Specification, Part II.

LINEAR11: bits 15..11 = N (5-bit two's complement), bits 10..0 = Y (11-bit two's
complement), value = Y * 2**N. LINEAR16: value = V * 2**N, V unsigned 16 bit, N from
VOUT_MODE bits 4..0 (bits 7..5 = 000 for linear mode). Every word below is worked out by
hand from those bit definitions.
"""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.pmbus import (
    linear11_decode,
    linear11_encode,
    linear16_decode,
    linear16_encode,
    vout_mode_exponent,
)

LINEAR11_MAX = 1023 * 2.0**15
LINEAR11_MIN = -1024 * 2.0**15


def _exponent(word: int) -> int:
    return ((word >> 11) ^ 0x10) - 0x10  # sign-extend 5 bits (independent of the module)


@pytest.mark.parametrize(
    ("word", "value"),
    [
        (0xD3E8, 15.625),  # N = 11010b = -6, Y = 0x3E8 = 1000 -> 1000/64
        (0x0000, 0.0),  # N = 0, Y = 0
        (0x03FF, 1023.0),  # N = 0, Y = 0x3FF = largest positive mantissa
        (0x07FF, -1.0),  # N = 0, Y = 0x7FF = all ones = -1
        (0x0400, -1024.0),  # N = 0, Y = 0x400 = -1024, most negative mantissa
        (0x8400, -0.015625),  # N = 10000b = -16, Y = -1024 -> -1024/65536
        (0x8001, 2.0**-16),  # N = -16, Y = 1: finest positive step
        (0x87FF, -(2.0**-16)),  # N = -16, Y = 0x7FF = -1
        (0x7BFF, 33521664.0),  # N = 01111b = 15, Y = 1023 -> 1023 * 32768
        (0x7C00, -33554432.0),  # N = 15, Y = -1024 -> -1024 * 32768
        (0xBA00, 1.0),  # N = 10111b = -9, Y = 0x200 = 512
        (0xB400, -1.0),  # N = 10110b = -10, Y = -1024
        (0xF800, 0.0),  # N = 11111b = -1, Y = 0
        (0xE2A4, 42.25),  # N = 11100b = -4, Y = 0x2A4 = 676 -> 676/16
        (0xEAA4, 84.5),  # N = 11101b = -3, Y = 676 -> 676/8
        (0x1001, 4.0),  # N = 00010b = 2, Y = 1
    ],
)
def test_linear11_decode_known_words(word: int, value: float) -> None:
    assert linear11_decode(word) == value
    assert linear11_decode(np.uint16(word)) == value


@pytest.mark.parametrize(
    ("value", "word"),
    [
        (15.625, 0xD3E8),  # 15.625 * 64 = 1000 fits; * 128 = 2000 does not -> N = -6
        (12.5, 0xD320),  # 12.5 * 64 = 800 -> N = -6, Y = 0x320
        (1.0, 0xBA00),  # 1 * 1024 = 1024 > 1023 -> N = -9, Y = 512
        (-1.0, 0xB400),  # -1 * 1024 = -1024 fits -> N = -10, Y = -1024 (0x400)
        (42.25, 0xE2A4),  # 42.25 * 16 = 676 fits; * 32 = 1352 does not -> N = -4
        (84.5, 0xEAA4),  # 84.5 * 8 = 676 fits; * 16 = 1352 does not -> N = -3
        (33521664.0, 0x7BFF),  # largest LINEAR11 value: N = 15, Y = 1023
        (-33554432.0, 0x7C00),  # most negative: N = 15, Y = -1024
        (-0.015625, 0x8400),  # N = -16, Y = -1024
    ],
)
def test_linear11_encode_known_words(value: float, word: int) -> None:
    assert int(linear11_encode(value)) == word


def test_linear11_rounds_half_to_even() -> None:
    # With N = -1 the step is 0.5: 0.25 -> Y = 0.5 -> 0; 0.75 -> 1.5 -> 2; -0.75 -> -2.
    assert linear11_decode(linear11_encode([0.25, 0.75, -0.75], exponent=-1)).tolist() == [
        0.0,
        1.0,
        -1.0,
    ]
    # Auto exponent: 1023.5 * 2**-10 needs N = -10 for Y = 1023.5 -> ties to 1024, which
    # does not fit, so N = -9 with Y = 511.75 -> 512: the value becomes exactly 1.0.
    assert int(linear11_encode(1023.5 * 2.0**-10)) == 0xBA00
    # Near the top: 1023.4 at N = 0 rounds to 1023 (0x03FF).
    assert int(linear11_encode(1023.4)) == 0x03FF


def test_twos_complement_edges() -> None:
    # Most negative exponent with most negative mantissa (N = -16, Y = -1024).
    assert int(linear11_encode(-1024 * 2.0**-16, exponent=-16)) == 0x8400
    assert linear11_decode(0x8400) == -1024 * 2.0**-16
    # Exponent field 01111b = +15 and 10000b = -16 sit on either side of the sign bit.
    assert _exponent(0x7800) == 15
    assert linear11_decode([0x7801, 0x8001]).tolist() == [2.0**15, 2.0**-16]


@given(st.floats(min_value=LINEAR11_MIN, max_value=LINEAR11_MAX))
def test_linear11_round_trip_within_half_lsb(value: float) -> None:
    word = int(linear11_encode(value))
    lsb = 2.0 ** _exponent(word)
    assert abs(float(linear11_decode(word)) - value) <= 0.5 * lsb


@given(st.integers(min_value=0, max_value=0xFFFF))
def test_linear11_decoded_values_encode_exactly(word: int) -> None:
    value = linear11_decode(word)
    assert linear11_decode(linear11_encode(value)) == value


@pytest.mark.parametrize(
    ("mode", "exponent"),
    [(0x17, -9), (0x14, -12), (0x13, -13), (0x10, -16), (0x0F, 15), (0x00, 0), (0x1F, -1)],
)
def test_vout_mode_exponents(mode: int, exponent: int) -> None:
    # bits 4..0 as 5-bit two's complement, e.g. 0x17 = 10111b = 23 - 32 = -9
    assert vout_mode_exponent(mode) == exponent


@pytest.mark.parametrize(
    ("word", "mode", "volts"),
    [
        (0x0CCD, 0x14, 3277 / 4096),  # N = -12: 0x0CCD = 3277
        (0x0200, 0x17, 1.0),  # N = -9: 512 / 512
        (0x0266, 0x17, 614 / 512),  # 1.19921875 V
        (0xFFFF, 0x17, 65535 / 512),  # top of range, V is unsigned
        (0x0003, 0x01, 6.0),  # N = +1
    ],
)
def test_linear16_known_words(word: int, mode: int, volts: float) -> None:
    assert linear16_decode(word, mode) == volts


def test_linear16_encode_rounds_half_to_even() -> None:
    # N = -9: 0.8 * 512 = 409.6 -> 410 (0x019A); 1.2 * 512 = 614.4 -> 614 (0x0266).
    assert linear16_encode([0.8, 1.2], 0x17).tolist() == [0x019A, 0x0266]
    # Exact ties: 2.5/512 -> 2, 3.5/512 -> 4.
    assert linear16_encode([2.5 / 512, 3.5 / 512], 0x17).tolist() == [2, 4]


@given(
    st.integers(min_value=-16, max_value=15),
    st.floats(min_value=0.0, max_value=1.0),
)
def test_linear16_round_trip_within_half_lsb(exponent: int, fraction: float) -> None:
    mode = exponent & 0x1F
    value = fraction * 0xFFFF * 2.0**exponent
    decoded = float(linear16_decode(linear16_encode(value, mode), mode))
    assert abs(decoded - value) <= 0.5 * 2.0**exponent
