"""Posterior sd maps: the fast routes against the straightforward dense computation.

Reference: sd = sqrt(diag(H Sigma H^T)) with H built column by column from the definition
Re w^n, Im w^n (numpy complex powers), evaluated in extended precision (np.longdouble) so that
the reference's own rounding is far below the tolerance.
"""

import numpy as np
import pytest

from invert import Disk, LinearProblem, Tikhonov


def definition_design(d, pts):
    w = (pts[:, 0] + 1j * pts[:, 1]) / d.radius
    cols = [np.ones(len(w))]
    for n in range(1, d.n_modes + 1):
        cols += [(w**n).real, (w**n).imag]
    return np.column_stack(cols)


def reference_sd(est, pts):
    H = definition_design(est.domain, pts).astype(np.longdouble)
    S = est.cov.astype(np.longdouble)
    return np.sqrt(np.einsum("ij,jk,ik->i", H, S, H)).astype(float)


@pytest.fixture
def estimate(rng):
    # 20 rim sensors with a 4-sensor gap, 64 harmonics (SYNTHETIC): the sd varies 80-fold.
    d = Disk(1.0, (0.0, 0.0), 64)
    c = rng.standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    sp = d.from_polar(1.0, np.linspace(0, 2 * np.pi, 24, endpoint=False)[4:])
    prob = LinearProblem(d.design(sp), d.design(sp) @ c, np.full(len(sp), 0.05), d.degrees,
                         d.eigenvalues, d)
    return Tikhonov("fixed", lam=0.05**2).fit(prob)


def test_design_recurrence_equals_the_definition(estimate, rng):
    # Real recurrence of the powers vs numpy's complex powers: 1e-13 (|w| <= 1, 64 steps).
    d = estimate.domain
    pts = d.from_polar(np.sqrt(rng.random(500)), rng.uniform(0, 2 * np.pi, 500))
    np.testing.assert_allclose(d.design(pts), definition_design(d, pts), rtol=0, atol=1e-13)


def test_cartesian_sd_map_equals_dense(estimate):
    # Estimate.at on a Cartesian grid (blocked design rows, H R row sums): 1e-12 relative, the
    # rounding of a 129-term product on an sd that varies 80-fold (observed ~3e-13).
    _, _, pts, inside = estimate.domain.interior_grid(61)
    pts = pts[inside]
    np.testing.assert_allclose(estimate.at(pts, block=500).sd, reference_sd(estimate, pts),
                               rtol=1e-12)


def test_polar_sd_map_equals_dense(estimate):
    # One FFT per ring (band sums of T0' Sigma T0): exact in exact arithmetic; the FFT's
    # rounding is ~eps times the largest variance on a ring, so relative to the smallest sd
    # (80 times below the largest) it is ~1e-13; 1e-12 relative (observed 8e-13 worst case on
    # a 251 x 785 grid, 2e-13 here). Fewer angles than 4N+1 (folding) is exact too.
    rho = np.linspace(0.0, 1.0, 21)
    for n_angles in (360, 97):
        got = estimate.polar_map(rho, n_angles)
        pts = estimate.domain.polar_grid(rho, n_angles)
        np.testing.assert_allclose(got.sd, reference_sd(estimate, pts), rtol=1e-12)
        ref = estimate.at(pts)
        np.testing.assert_allclose(got.mean, ref.mean, rtol=0, atol=1e-12)
        np.testing.assert_allclose(got.upper - got.lower, ref.upper - ref.lower, rtol=1e-12)
