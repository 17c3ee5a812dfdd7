"""PMBus numeric formats and status bits (PMBus Power System Management Protocol
Specification, Part II).

* LINEAR11: a 16-bit word; bits 15..11 hold a 5-bit two's-complement exponent N, bits
  10..0 an 11-bit two's-complement mantissa Y; value = Y * 2**N.
* LINEAR16 (output voltages): an unsigned 16-bit mantissa V; the exponent N comes from
  VOUT_MODE (bits 7..5 = 000 select linear mode, bits 4..0 hold N); value = V * 2**N.

Encoders round to the nearest code with ties to even (``numpy.rint``) and raise
ValueError for values they cannot represent. Decoders accept a Python int or an integer
array (any shape; an empty array of any dtype) and raise ValueError for words outside
0..0xFFFF.
"""

from collections.abc import Mapping
from types import MappingProxyType
from typing import Any, Final, TypeVar

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]
WordArray = npt.NDArray[np.uint16]
BoolArray = npt.NDArray[np.bool_]

_Field = TypeVar("_Field", int, IntArray)

LINEAR11_EXPONENTS: Final = np.arange(-16, 16)  # the 32 values of a 5-bit two's-complement N
LINEAR11_Y_MIN: Final = -1024  # 11-bit two's-complement mantissa range
LINEAR11_Y_MAX: Final = 1023
LINEAR16_V_MAX: Final = 0xFFFF  # unsigned 16-bit mantissa

# STATUS_WORD: the low byte is STATUS_BYTE. PMBus Part II, STATUS_BYTE and STATUS_WORD
# command sections (17.1 and 17.2 in revision 1.2; from memory). The bit positions agree
# with the open-source Linux hwmon PMBus driver header.
STATUS_WORD_BITS: Final[Mapping[str, int]] = MappingProxyType(
    {
        "NONE_OF_THE_ABOVE": 0,
        "CML": 1,
        "TEMPERATURE": 2,
        "VIN_UV_FAULT": 3,
        "IOUT_OC_FAULT": 4,
        "VOUT_OV_FAULT": 5,
        "OFF": 6,
        "BUSY": 7,
        "UNKNOWN": 8,
        "OTHER": 9,
        "FANS": 10,
        "POWER_GOOD#": 11,
        "MFR_SPECIFIC": 12,
        "INPUT": 13,
        "IOUT/POUT": 14,
        "VOUT": 15,
    }
)
# STATUS_IOUT: PMBus Part II, STATUS_IOUT command section (17.4 in revision 1.2; from memory).
STATUS_IOUT_BITS: Final[Mapping[str, int]] = MappingProxyType(
    {
        "POUT_OP_WARNING": 0,
        "POUT_OP_FAULT": 1,
        "POWER_LIMITING": 2,
        "CURRENT_SHARE_FAULT": 3,
        "IOUT_UC_FAULT": 4,
        "IOUT_OC_WARNING": 5,
        "IOUT_OC_LV_FAULT": 6,
        "IOUT_OC_FAULT": 7,
    }
)
# STATUS_TEMPERATURE: PMBus Part II, STATUS_TEMPERATURE command section (17.6 in revision
# 1.2; from memory). Bits 3..0 are reserved and ignored by the decoder.
STATUS_TEMPERATURE_BITS: Final[Mapping[str, int]] = MappingProxyType(
    {"UT_FAULT": 4, "UT_WARNING": 5, "OT_WARNING": 6, "OT_FAULT": 7}
)

# STATUS_INPUT: PMBus Part II, STATUS_INPUT command section (17.5 in revision 1.2; from memory).
STATUS_INPUT_BITS: Final[Mapping[str, int]] = MappingProxyType(
    {
        "PIN_OP_WARNING": 0,
        "IIN_OC_WARNING": 1,
        "IIN_OC_FAULT": 2,
        "UNIT_OFF_LOW_VIN": 3,
        "VIN_UV_FAULT": 4,
        "VIN_UV_WARNING": 5,
        "VIN_OV_WARNING": 6,
        "VIN_OV_FAULT": 7,
    }
)

# STATUS_VOUT: PMBus Part II, STATUS_VOUT command section (17.3 in revision 1.2; from memory;
# bits 7..4 agree with the voltage bits of the Linux hwmon PMBus driver header).
STATUS_VOUT_BITS: Final[Mapping[str, int]] = MappingProxyType(
    {
        "VOUT_TRACKING_ERROR": 0,
        "TOFF_MAX_WARNING": 1,
        "TON_MAX_FAULT": 2,
        "VOUT_MAX_MIN_WARNING": 3,
        "VOUT_UV_FAULT": 4,
        "VOUT_UV_WARNING": 5,
        "VOUT_OV_WARNING": 6,
        "VOUT_OV_FAULT": 7,
    }
)


def _unsigned(raw: npt.ArrayLike, name: str, bits: int) -> IntArray:
    """Validate integer field(s) in 0 .. 2**bits - 1 and return them as int64."""
    arr = np.asarray(raw)
    if arr.dtype.kind not in "iu" and arr.size > 0:
        raise ValueError(f"{name} must be an integer or an integer array, got dtype {arr.dtype}")
    if np.any(arr < 0) or np.any(arr > (1 << bits) - 1):
        raise ValueError(f"{name} must lie in 0..0x{(1 << bits) - 1:X}")
    return arr.astype(np.int64)


def _signed(field: _Field, bits: int) -> _Field:
    """Two's-complement value of an unsigned ``bits``-wide field."""
    return field - ((field >> (bits - 1)) << bits)


def _finite(value: npt.ArrayLike, name: str) -> FloatArray:
    arr = np.asarray(value, dtype=np.float64)
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{name} must be finite")
    return arr


def linear11_decode(word: npt.ArrayLike) -> FloatArray:
    """Decode LINEAR11 word(s) to floats; the result has the shape of ``word``.

    >>> print(linear11_decode(0xD3E8))  # N = 0b11010 = -6, Y = 0x3E8 = 1000
    15.625
    >>> linear11_decode(np.array([0x0400, 0xBA00], dtype=np.uint16)).tolist()
    [-1024.0, 1.0]
    """
    w = _unsigned(word, "word", 16)
    exponent = _signed(w >> 11, 5)
    mantissa = _signed(w & 0x7FF, 11)
    return np.asarray(mantissa * 2.0**exponent, dtype=np.float64)


def linear11_encode(value: npt.ArrayLike, *, exponent: int | None = None) -> WordArray:
    """Encode float(s) as LINEAR11 word(s) (uint16, the shape of ``value``).

    With ``exponent=None`` each value gets the smallest exponent N in -16..15 whose
    rounded mantissa fits in -1024..1023, i.e. the finest step that can hold it; a value
    that rounds to zero encodes as 0x0000. With an explicit ``exponent`` every value uses
    it. Mantissas are rounded half to even (``numpy.rint``). ValueError if a value is not
    finite or does not fit.

    >>> hex(int(linear11_encode(12.5)))  # N = -6, Y = 800
    '0xd320'
    >>> [hex(w) for w in linear11_encode([1.0, -1.0]).tolist()]  # Y = 512 at -9; -1024 at -10
    ['0xba00', '0xb400']
    >>> linear11_encode([2.5, 3.5], exponent=0).tolist()  # ties to even
    [2, 4]
    """
    v = _finite(value, "value")
    if exponent is None:
        with np.errstate(over="ignore"):
            candidates = np.rint(v[..., np.newaxis] * 2.0**-LINEAR11_EXPONENTS)
        fits = (candidates >= LINEAR11_Y_MIN) & (candidates <= LINEAR11_Y_MAX)
        if not np.all(fits.any(axis=-1)):
            raise ValueError("value outside the LINEAR11 range (-1024.5 .. 1023.5) * 2**15")
        best = np.argmax(fits, axis=-1)
        mantissa = np.take_along_axis(candidates, best[..., np.newaxis], axis=-1)[..., 0]
        n = np.where(mantissa == 0.0, 0, LINEAR11_EXPONENTS[best])
    else:
        if isinstance(exponent, bool) or not isinstance(exponent, int):
            raise ValueError("exponent must be an int in -16..15 or None")
        if not -16 <= exponent <= 15:
            raise ValueError("exponent must lie in -16..15")
        mantissa = np.rint(v * 2.0**-exponent)
        if np.any(mantissa < LINEAR11_Y_MIN) or np.any(mantissa > LINEAR11_Y_MAX):
            raise ValueError(f"value does not fit a LINEAR11 mantissa with exponent {exponent}")
        n = np.full(v.shape, exponent)
    word = ((n.astype(np.int64) & 0x1F) << 11) | (mantissa.astype(np.int64) & 0x7FF)
    return word.astype(np.uint16)


def vout_mode_exponent(vout_mode: int | np.integer[Any]) -> int:
    """Exponent N of the LINEAR16 format from a VOUT_MODE byte.

    Bits 7..5 must be 000 (linear mode; VID, direct and other modes raise ValueError),
    bits 4..0 hold N as 5-bit two's complement.

    >>> vout_mode_exponent(0x17)
    -9
    >>> vout_mode_exponent(0x0F)
    15
    """
    mode = _unsigned(vout_mode, "vout_mode", 8)
    if mode.ndim != 0:
        raise ValueError("vout_mode must be a single byte")
    byte = int(mode)
    if byte >> 5:
        raise ValueError(
            f"vout_mode 0x{byte:02X} selects mode bits {byte >> 5:03b}, not linear 000"
        )
    return _signed(byte & 0x1F, 5)


def linear16_decode(word: npt.ArrayLike, vout_mode: int | np.integer[Any]) -> FloatArray:
    """Decode LINEAR16 word(s) with the exponent from ``vout_mode``; shape of ``word``.

    >>> print(linear16_decode(0x0CCD, 0x14))  # N = -12: 3277 / 4096
    0.800048828125
    """
    n = vout_mode_exponent(vout_mode)
    return np.asarray(_unsigned(word, "word", 16) * 2.0**n, dtype=np.float64)


def linear16_encode(value: npt.ArrayLike, vout_mode: int | np.integer[Any]) -> WordArray:
    """Encode float(s) as LINEAR16 word(s) (uint16, shape of ``value``), rounding half to even.

    ValueError if a value is not finite or its mantissa falls outside 0..0xFFFF.

    >>> hex(int(linear16_encode(0.8, 0x14)))  # 0.8 * 4096 = 3276.8 -> 3277
    '0xccd'
    """
    n = vout_mode_exponent(vout_mode)
    mantissa = np.rint(_finite(value, "value") * 2.0**-n)
    if np.any(mantissa < 0) or np.any(mantissa > LINEAR16_V_MAX):
        raise ValueError(f"value outside the LINEAR16 range 0 .. {LINEAR16_V_MAX} * 2**{n}")
    return mantissa.astype(np.uint16)


def _flags(raw: IntArray, table: Mapping[str, int]) -> dict[str, BoolArray]:
    return {name: ((raw >> bit) & 1).astype(np.bool_) for name, bit in table.items()}


def _decode_one(
    raw: int | np.integer[Any], name: str, bits: int, table: Mapping[str, int]
) -> frozenset[str]:
    value = _unsigned(raw, name, bits)
    if value.ndim != 0:
        raise ValueError(f"{name} must be a single integer")
    return frozenset(flag for flag, is_set in _flags(value, table).items() if is_set)


def decode_status_word(word: int | np.integer[Any]) -> frozenset[str]:
    """Names of the bits set in a STATUS_WORD (see ``STATUS_WORD_BITS``).

    >>> sorted(decode_status_word(0x2850))  # INPUT, POWER_GOOD#, OFF, IOUT_OC_FAULT
    ['INPUT', 'IOUT_OC_FAULT', 'OFF', 'POWER_GOOD#']
    """
    return _decode_one(word, "word", 16, STATUS_WORD_BITS)


def decode_status_iout(byte: int | np.integer[Any]) -> frozenset[str]:
    """Names of the bits set in a STATUS_IOUT byte (see ``STATUS_IOUT_BITS``).

    >>> sorted(decode_status_iout(0xA0))
    ['IOUT_OC_FAULT', 'IOUT_OC_WARNING']
    """
    return _decode_one(byte, "byte", 8, STATUS_IOUT_BITS)


def decode_status_temperature(byte: int | np.integer[Any]) -> frozenset[str]:
    """Names of the bits set in a STATUS_TEMPERATURE byte; reserved bits 3..0 are ignored.

    >>> sorted(decode_status_temperature(0xC0))
    ['OT_FAULT', 'OT_WARNING']
    """
    return _decode_one(byte, "byte", 8, STATUS_TEMPERATURE_BITS)


def decode_status_vout(byte: int | np.integer[Any]) -> frozenset[str]:
    """Names of the bits set in a STATUS_VOUT byte (see ``STATUS_VOUT_BITS``).

    >>> sorted(decode_status_vout(0x90))  # over- and under-voltage fault
    ['VOUT_OV_FAULT', 'VOUT_UV_FAULT']
    """
    return _decode_one(byte, "byte", 8, STATUS_VOUT_BITS)


def status_word_flags(words: npt.ArrayLike) -> dict[str, BoolArray]:
    """One boolean array (shape of ``words``) per STATUS_WORD bit name.

    >>> flags = status_word_flags([0x0000, 0x0010, 0x0004])
    >>> flags["IOUT_OC_FAULT"].tolist(), flags["TEMPERATURE"].tolist()
    ([False, True, False], [False, False, True])
    """
    return _flags(_unsigned(words, "words", 16), STATUS_WORD_BITS)


def status_iout_flags(bytes_: npt.ArrayLike) -> dict[str, BoolArray]:
    """One boolean array (shape of ``bytes_``) per STATUS_IOUT bit name.

    >>> status_iout_flags([0x00, 0x80, 0x20])["IOUT_OC_FAULT"].tolist()
    [False, True, False]
    """
    return _flags(_unsigned(bytes_, "bytes", 8), STATUS_IOUT_BITS)


def status_temperature_flags(bytes_: npt.ArrayLike) -> dict[str, BoolArray]:
    """One boolean array (shape of ``bytes_``) per STATUS_TEMPERATURE bit name.

    >>> status_temperature_flags([0x40, 0x80])["OT_WARNING"].tolist()
    [True, False]
    """
    return _flags(_unsigned(bytes_, "bytes", 8), STATUS_TEMPERATURE_BITS)


def status_vout_flags(bytes_: npt.ArrayLike) -> dict[str, BoolArray]:
    """One boolean array (shape of ``bytes_``) per STATUS_VOUT bit name.

    >>> status_vout_flags([0x00, 0x80, 0x40])["VOUT_OV_FAULT"].tolist()
    [False, True, False]
    """
    return _flags(_unsigned(bytes_, "bytes", 8), STATUS_VOUT_BITS)


def status_input_flags(bytes_: npt.ArrayLike) -> dict[str, BoolArray]:
    """One boolean array (shape of ``bytes_``) per STATUS_INPUT bit name.

    >>> flags = status_input_flags([0x04, 0x08])
    >>> flags["IIN_OC_FAULT"].tolist(), flags["UNIT_OFF_LOW_VIN"].tolist()
    ([True, False], [False, True])
    """
    return _flags(_unsigned(bytes_, "bytes", 8), STATUS_INPUT_BITS)
