"""Unit tests for phaseward.physics.pmbus (argument checks, shapes, status decoding)."""

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from phaseward.physics.pmbus import (
    STATUS_IOUT_BITS,
    STATUS_TEMPERATURE_BITS,
    STATUS_VOUT_BITS,
    STATUS_WORD_BITS,
    decode_status_iout,
    decode_status_temperature,
    decode_status_vout,
    decode_status_word,
    linear11_decode,
    linear11_encode,
    linear16_decode,
    linear16_encode,
    status_word_flags,
    vout_mode_exponent,
)

words = st.integers(min_value=0, max_value=0xFFFF)


def test_shapes_and_dtypes() -> None:
    grid = np.arange(12, dtype=np.uint16).reshape(3, 4)
    assert linear11_decode(grid).shape == (3, 4)
    assert linear16_decode(grid, 0x17).shape == (3, 4)
    encoded = linear11_encode(np.ones((2, 5)))
    assert encoded.shape == (2, 5)
    assert encoded.dtype == np.uint16
    assert linear11_encode(1.0, exponent=-2).dtype == np.uint16
    assert linear16_encode(np.ones(3), 0x17).dtype == np.uint16
    assert linear11_decode(0x0001).shape == ()


@pytest.mark.parametrize("bad", [-1, 0x10000, [0, 0x1FFFF]])
def test_decode_rejects_words_out_of_range(bad: int | list[int]) -> None:
    with pytest.raises(ValueError, match="word"):
        linear11_decode(bad)
    with pytest.raises(ValueError, match="word"):
        linear16_decode(bad, 0x17)


def test_decode_rejects_non_integers() -> None:
    with pytest.raises(ValueError, match="word"):
        linear11_decode(np.array([1.0, 2.0]))
    with pytest.raises(ValueError, match="word"):
        linear11_decode(True)


@pytest.mark.parametrize("value", [np.nan, np.inf, 1023.5 * 2**15, -1e12])
def test_encode_rejects_unrepresentable(value: float) -> None:
    with pytest.raises(ValueError, match="value"):
        linear11_encode(value)


def test_encode_with_exponent_rejects_overflow_and_bad_exponents() -> None:
    with pytest.raises(ValueError, match="exponent 0"):
        linear11_encode(1024.0, exponent=0)
    for bad in (16, -17):
        with pytest.raises(ValueError, match="exponent"):
            linear11_encode(1.0, exponent=bad)
    with pytest.raises(ValueError, match="exponent"):
        linear11_encode(1.0, exponent=True)


def test_empty_inputs_keep_their_shape() -> None:
    assert linear11_decode(np.array([])).shape == (0,)
    assert status_word_flags([])["OFF"].shape == (0,)


def test_zero_and_sub_resolution_values_encode_as_zero_word() -> None:
    assert linear11_encode([0.0, -0.0, 2.0**-18]).tolist() == [0, 0, 0]


@given(st.floats(min_value=-1024 * 2.0**15, max_value=1023 * 2.0**15))
def test_auto_exponent_is_the_finest_that_fits(value: float) -> None:
    word = int(linear11_encode(value))
    exponent = ((word >> 11) ^ 0x10) - 0x10
    mantissa = ((word & 0x7FF) ^ 0x400) - 0x400
    if mantissa != 0 and exponent > -16:
        finer = np.rint(value * 2.0 ** -(exponent - 1))
        assert not -1024 <= finer <= 1023


@pytest.mark.parametrize("mode", [0x20, 0x40, 0x60, 0x80, 0xE0])
def test_non_linear_vout_modes_are_rejected(mode: int) -> None:
    with pytest.raises(ValueError, match="not linear"):
        vout_mode_exponent(mode)


@pytest.mark.parametrize("mode", [-1, 0x100])
def test_vout_mode_out_of_range(mode: int) -> None:
    with pytest.raises(ValueError, match="vout_mode"):
        vout_mode_exponent(mode)


def test_linear16_encode_range() -> None:
    with pytest.raises(ValueError, match="LINEAR16"):
        linear16_encode(-0.01, 0x17)
    with pytest.raises(ValueError, match="LINEAR16"):
        linear16_encode(128.0, 0x17)  # 128 * 512 = 65536
    with pytest.raises(ValueError, match="value"):
        linear16_encode(np.nan, 0x17)


def test_status_tables_are_complete_and_distinct() -> None:
    assert sorted(STATUS_WORD_BITS.values()) == list(range(16))
    assert sorted(STATUS_IOUT_BITS.values()) == list(range(8))
    assert sorted(STATUS_VOUT_BITS.values()) == list(range(8))
    assert sorted(STATUS_TEMPERATURE_BITS.values()) == [4, 5, 6, 7]
    assert {"OFF", "INPUT", "IOUT_OC_FAULT", "TEMPERATURE", "POWER_GOOD#"} <= set(STATUS_WORD_BITS)


@pytest.mark.parametrize(("name", "bit"), sorted(STATUS_WORD_BITS.items()))
def test_each_status_word_bit_decodes_alone(name: str, bit: int) -> None:
    assert decode_status_word(1 << bit) == {name}


@pytest.mark.parametrize(("name", "bit"), sorted(STATUS_IOUT_BITS.items()))
def test_each_status_iout_bit_decodes_alone(name: str, bit: int) -> None:
    assert decode_status_iout(1 << bit) == {name}


@pytest.mark.parametrize(("name", "bit"), sorted(STATUS_VOUT_BITS.items()))
def test_each_status_vout_bit_decodes_alone(name: str, bit: int) -> None:
    assert decode_status_vout(1 << bit) == {name}


def test_status_temperature_ignores_reserved_bits() -> None:
    assert decode_status_temperature(0x0F) == frozenset()
    assert decode_status_temperature(np.uint8(0x90)) == {"OT_FAULT", "UT_FAULT"}


def test_status_decoders_reject_bad_input() -> None:
    with pytest.raises(ValueError, match="word"):
        decode_status_word(0x10000)
    with pytest.raises(ValueError, match="byte"):
        decode_status_iout(0x100)
    with pytest.raises(ValueError, match="single"):
        decode_status_word(np.array([1, 2]))  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="words"):
        status_word_flags([-1])


@given(st.lists(words, min_size=1, max_size=20))
def test_vectorised_flags_agree_with_scalar_decoding(raw: list[int]) -> None:
    flags = status_word_flags(np.array(raw, dtype=np.uint16))
    assert set(flags) == set(STATUS_WORD_BITS)
    for i, word in enumerate(raw):
        assert {name for name, arr in flags.items() if arr[i]} == decode_status_word(word)


def test_flags_keep_the_input_shape() -> None:
    flags = status_word_flags(np.zeros((4, 3), dtype=np.int64))
    assert all(arr.shape == (4, 3) and arr.dtype == np.bool_ for arr in flags.values())
