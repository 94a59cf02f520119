"""The one copy of each shared piece of stage mathematics, against outside references."""

from fractions import Fraction
from math import log

import numpy as np
import pytest
from scipy import optimize

from invert.stages._search import grid_then_refine
from invert.stages.assimilate import information_update, measurement_update
from invert.stages.assimilate.filter import innovation_terms


def _exact_logdet_and_quad(H, d, r, v):
    """log|S| and v' S^-1 v, S = H diag(d) H^T + diag(r), in exact rational arithmetic."""
    n, p = H.shape
    Hf = [[Fraction(float(x)) for x in row] for row in H]
    df = [Fraction(float(x)) for x in d]
    A = [[sum(Hf[i][c] * df[c] * Hf[j][c] for c in range(p))
          + (Fraction(float(r[i])) if i == j else 0) for j in range(n)]
         + [Fraction(float(v[i]))] for i in range(n)]
    det = Fraction(1)
    for c in range(n):
        piv = next(i for i in range(c, n) if A[i][c] != 0)
        A[c], A[piv] = A[piv], A[c]
        det *= A[c][c] * (1 if piv == c else -1)
        for i in range(c + 1, n):
            g = A[i][c] / A[c][c]
            A[i] = [a - g * b for a, b in zip(A[i], A[c], strict=True)]
    x = [Fraction(0)] * n
    for i in range(n - 1, -1, -1):
        x[i] = (A[i][n] - sum(A[i][j] * x[j] for j in range(i + 1, n))) / A[i][i]
    quad = sum(Fraction(float(v[i])) * x[i] for i in range(n))
    return log(det.numerator) - log(det.denominator), float(quad)


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


@pytest.mark.parametrize("broad", [False, True])
def test_information_update_is_gaussian_conditioning(rng, broad):
    # Reference as above (Bishop 2006, eqs. 2.116-2.117) from a diagonal prior D, formed with
    # D^-1 directly (no cancellation): cov = (D^-1 + H^T R^-1 H)^-1. With one broad entry
    # (1e8, the batch runner's mean level) the covariance form cancels ~1e8 against ~1e-2;
    # the information form must not. Tolerance 1e-10 relative: algebra, the information
    # matrix has condition ~1e3 here. The innovation terms log|S| and v' S^-1 v (for the
    # prediction-error likelihood, Harvey 1989), S = H D H^T + R,
    # against exact rational arithmetic from H, D, R (fractions; S is too ill-conditioned,
    # ~1e10, for a float reference under the broad prior); 1e-10 relative: algebra.
    p, k = 5, 7
    d = rng.uniform(0.5, 2.0, p)
    if broad:
        d[0] = 1e8
    H, r = rng.standard_normal((k, p)), rng.uniform(0.01, 0.02, k)
    m, y = rng.standard_normal(p), rng.standard_normal(k)
    cov = np.linalg.inv(np.diag(1.0 / d) + H.T @ (H / r[:, None]))
    mean = cov @ (m / d + H.T @ (y / r))
    u = information_update(d, H, r, m=m, y=y)
    np.testing.assert_allclose(u.P, cov, rtol=1e-10, atol=1e-10 * np.abs(cov).max())
    np.testing.assert_allclose(u.m, mean, rtol=1e-10, atol=1e-10 * np.abs(mean).max())
    np.testing.assert_allclose(u.K @ H, np.eye(p) - u.IKH, atol=1e-12)
    logdet, q = innovation_terms(u, d, H, r, m)
    ref_logdet, ref_q = _exact_logdet_and_quad(H, d, r, u.v)
    assert logdet == pytest.approx(ref_logdet, rel=1e-10)
    assert q == pytest.approx(ref_q, rel=1e-10)
    if not broad:
        # agrees with the covariance form where that one is accurate (1e-10: algebra)
        w = measurement_update(np.diag(d), H, r, m=m, y=y)
        np.testing.assert_allclose(u.P, w.P, rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(u.Sinv, w.Sinv, rtol=1e-10, atol=1e-10)


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
