"""The trust-region reflective solver against scipy's ``least_squares(method="trf")``.

:mod:`fitting.trust_region` runs scipy's algorithm (Branch, Coleman & Li 1999) on the
Jacobian's QR factor instead of the Jacobian: the iterates, the number of
evaluations and the way a run ends must be scipy's, on problems with bounds that
become active, both x_scale choices and evaluation caps.
"""

import numpy as np
import pytest
from scipy.optimize import least_squares

from fitting.trust_region import trf


def _problem(rng, m, n):
    A = rng.standard_normal((m, n))
    b = rng.standard_normal(m) * rng.uniform(0.1, 3)
    c = rng.uniform(0, 0.5)

    def fun(x):
        z = A @ x
        return z + c * np.sin(z) - b

    def jac(x):
        return A * (1 + c * np.cos(A @ x))[:, None]

    return fun, jac


@pytest.mark.parametrize("seed", range(6))
def test_same_iterates_as_scipy(seed):
    rng = np.random.default_rng(seed)
    for trial in range(25):
        m, n = int(rng.integers(3, 300)), int(rng.integers(1, 8))
        fun, jac = _problem(rng, m, n)
        lo, hi = -rng.uniform(0.01, 1, n), rng.uniform(0.01, 1, n)
        if trial % 5 == 0:
            hi[0] = np.inf                       # a one-sided bound
        x0 = np.clip(0.3 * rng.standard_normal(n), lo, hi)
        kw = dict(x_scale="jac" if trial % 2 else 1.0, max_nfev=None if trial % 3 else 7,
                  ftol=1e-8, xtol=1e-8, gtol=1e-8)
        ref = least_squares(fun, x0, jac=jac, bounds=(lo, hi), method="trf", **kw)
        got = trf(fun, jac, x0, lo, hi, **kw)
        assert got.nfev == ref.nfev and got.status == ref.status
        assert np.allclose(got.x, ref.x, rtol=0, atol=1e-8)
        assert got.cost == pytest.approx(ref.cost, rel=1e-9, abs=1e-14)
        assert got.success == ref.success and got.message == ref.message


def test_bounds_become_active():
    # The unconstrained minimum of (x - 2)² lies outside [−1, 1]: the solution sits
    # on the upper bound, as scipy's does.
    def fun(x):
        return np.array([x[0] - 2.0, 0.5 * (x[1] + 3.0)])

    def jac(x):
        return np.diag([1.0, 0.5])

    got = trf(fun, jac, [0.0, 0.0], [-1, -1], [1, 1])
    ref = least_squares(fun, [0.0, 0.0], jac=jac, bounds=([-1, -1], [1, 1]), method="trf")
    assert np.allclose(got.x, ref.x, atol=1e-8) and np.allclose(got.x, [1, -1], atol=1e-6)


def test_unbounded_problems_use_scipys_unbounded_variant():
    def fun(x):
        return np.array([x[0] - 2.0, 10 * (x[1] - x[0] ** 2)])

    def jac(x):
        return np.array([[1.0, 0.0], [-20 * x[0], 10.0]])

    got = trf(fun, jac, [0.0, 0.0], [-np.inf] * 2, [np.inf] * 2)
    assert np.allclose(got.x, [2.0, 4.0], atol=1e-6) and got.success


def test_refuses_what_scipy_refuses():
    def fun(x):
        return x - 1

    def jac(x):
        return np.eye(1)

    with pytest.raises(ValueError, match="outside"):
        trf(fun, jac, [5.0], [0.0], [1.0])
    with pytest.raises(ValueError, match="strictly less"):
        trf(fun, jac, [0.5], [1.0], [1.0])
    with pytest.raises(ValueError, match="not finite"):
        trf(lambda x: np.array([np.nan]), jac, [0.5], [0.0], [1.0])
