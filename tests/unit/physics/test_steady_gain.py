"""linear_recurrence against the recurrence stepped one row at a time (its definition), and
steady_gain's failure policy."""

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from phaseward.physics.steady_gain import linear_recurrence, steady_gain


@settings(max_examples=40, deadline=None)
@given(n=st.integers(1, 12), m=st.integers(1, 300), seed=st.integers(0, 10**6))
def test_linear_recurrence_equals_stepping(n: int, m: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    q, _ = np.linalg.qr(rng.normal(size=(n, n)))
    a = q @ np.diag(rng.uniform(-0.999, 0.999, n)) @ q.T  # stable, as a closed-loop filter
    x0 = rng.normal(0.0, 50.0, n)
    c = rng.normal(0.0, 5.0, (m, n))
    want, x = np.empty((m, n)), x0
    for k in range(m):
        x = a @ x + c[k]
        want[k] = x
    got = linear_recurrence(a, x0, c)
    assert got.shape == (m, n)
    np.testing.assert_allclose(got, want, rtol=0.0, atol=1e-9 * (1.0 + np.abs(want).max()))


def test_no_stabilising_solution_gives_none() -> None:
    """An unstable mode the sensors cannot see: the filter cannot converge (not detectable)."""
    f = np.diag([1.2, 0.5])
    assert steady_gain(f, np.eye(2), np.array([1]), np.array([1.0])) is None
