"""Capture uploads (api/schemas/captures.py): the same columns sent as CSV, a structured .npy
or an .npz archive parse to the same arrays; NumPy files are checked before their data is read."""

from __future__ import annotations

import io
import zipfile

import numpy as np
import pytest
from hypothesis import assume, given, settings
from hypothesis import strategies as st
from tests.buck_sim import as_csv, as_npy, as_npz

from phaseward.api.schemas.captures import parse_capture
from phaseward.errors import InvalidInput, PayloadTooLarge
from phaseward.store.captures import CaptureArrays

LIMIT = 1 << 20
finite = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False, allow_infinity=False)


def parse(content: bytes, kind: str, *, limit: int = LIMIT) -> CaptureArrays:
    return parse_capture(io.BytesIO(content), kind=kind, size_limit=limit, max_samples=10_000)


@settings(deadline=None)  # numeric work, timed only in bench/
@given(
    n=st.integers(min_value=4, max_value=40),
    phases=st.integers(min_value=1, max_value=3),
    with_iin=st.booleans(),
    data=st.data(),
)
def test_every_format_gives_the_same_arrays(
    n: int, phases: int, with_iin: bool, data: st.DataObject
) -> None:
    steps = data.draw(st.lists(st.floats(min_value=1e-9, max_value=1.0), min_size=n, max_size=n))
    cols = {"t_s": np.cumsum(steps) - 0.5}
    names = [
        "vin_v",
        "vout_v",
        *(["iin_a"] if with_iin else []),
        *(f"i{k}_a" for k in range(phases)),
    ]
    for name in names:
        cols[name] = np.array(data.draw(st.lists(finite, min_size=n, max_size=n)))
    assume(len(np.unique(cols["t_s"])) == n)  # steps below float resolution: not a capture
    parsed = [
        parse(as_csv(cols, fmt="%.17g"), "csv"),
        parse(as_npy(cols), "npy"),
        parse(as_npz(cols), "npz"),
    ]
    for capture in parsed:
        np.testing.assert_array_equal(capture.t_s, cols["t_s"])
        np.testing.assert_array_equal(capture.current_a[:, -1], cols[f"i{phases - 1}_a"])
        assert capture.current_a.shape == (n, phases)
        assert (capture.iin_a is not None) == with_iin
        assert capture.switch_v is None
    assert [c.source_format for c in parsed] == ["csv", "npy", "npz"]


def test_a_zip_that_unpacks_beyond_the_limit_is_413_before_reading() -> None:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("t_s.npy", b"\0" * (4 * LIMIT))  # 4 MiB of zeros in a few kB
    assert len(buf.getvalue()) < LIMIT // 100
    with pytest.raises(PayloadTooLarge, match="unpacks to 4194304 bytes"):
        parse(buf.getvalue(), "npz")


def test_an_npy_header_declaring_too_much_is_413() -> None:
    buf = io.BytesIO()
    np.lib.format.write_array_header_1_0(
        buf, {"descr": "<f8", "fortran_order": False, "shape": (10**9,)}
    )
    with pytest.raises(PayloadTooLarge, match="declares 8000000000 bytes"):
        parse(buf.getvalue(), "npy")


def test_object_arrays_are_refused_without_unpickling() -> None:
    buf = io.BytesIO()
    np.save(buf, np.array([object()], dtype=object), allow_pickle=True)
    with pytest.raises(InvalidInput, match="pickle"):
        parse(buf.getvalue(), "npy")
