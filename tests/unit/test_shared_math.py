"""The one copy of each shared piece of stage mathematics, against outside references."""

import numpy as np
import pytest
from scipy import optimize

from invert.stages._search import grid_then_refine
from invert.stages.assimilate import measurement_update


def _spd(rng, p):
    A = rng.standard_normal((p, p))
    return A @ A.T + p * np.eye(p)


@pytest.mark.parametrize("joseph", [True, False])
def test_measurement_update_is_gaussian_conditioning(rng, joseph):
    # Reference: the posterior of x ~ N(m, P) given y = Hx + e, e ~ N(0, diag(r)), in
    # information form (Bishop 2006, eqs. 2.116-2.117): cov = (P^-1 + H^T R^-1 H)^-1,
    # mean = cov (P^-1 m + H^T R^-1 y). 1e-10: algebra on well-conditioned 5x5 matrices.
    p, k = 5, 3
    P, H = _spd(rng, p), rng.standard_normal((k, p))
    r, m, y = rng.uniform(0.5, 2.0, k), rng.standard_normal(p), rng.standard_normal(k)
    Pi = np.linalg.inv(P)
    cov = np.linalg.inv(Pi + H.T @ (H / r[:, None]))
    mean = cov @ (Pi @ m + H.T @ (y / r))
    u = measurement_update(P, H, r, m=m, y=y, joseph=joseph)
    np.testing.assert_allclose(u.P, cov, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(u.m, mean, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(u.v, y - H @ m, rtol=1e-12)
    # The innovation covariance is H P H^T + R (Särkkä 2013, Thm 4.2).
    np.testing.assert_allclose(u.S, H @ P @ H.T + np.diag(r), rtol=1e-12)


def test_grid_then_refine_finds_a_closed_form_minimum():
    # f(x) = (x - 0.37)^2 + 1 has its minimum at 0.37; bounded Brent to xatol=1e-8 must get
    # there (tolerance 1e-7: a few xatol), and agree with scipy's own bounded search on the
    # bracket the grid gives.
    f = lambda x: (x - 0.37) ** 2 + 1.0  # noqa: E731
    grid = np.linspace(-2, 2, 9)
    x, fx, i, refined = grid_then_refine(f, grid, xatol=1e-8, full_output=True)
    assert refined and abs(x - 0.37) < 1e-7 and fx == pytest.approx(1.0, abs=1e-12)
    ref = optimize.minimize_scalar(f, bounds=(grid[i - 1], grid[i + 1]), method="bounded",
                                   options={"xatol": 1e-8})
    assert x == ref.x
    # Precomputed values are used as given; a best point at the end is kept unrefined.
    g = lambda x: x  # noqa: E731
    x, fx, i, refined = grid_then_refine(g, grid, xatol=1e-8, values=grid,
                                         refine_at_edge=False, full_output=True)
    assert (x, fx, i, refined) == (-2.0, -2.0, 0, False)
