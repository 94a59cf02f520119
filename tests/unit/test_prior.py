"""Smoothness prior: variances, point variance and truncation.

Matérn-type prior on the circle and sphere: Borovitskiy et al. 2020 (NeurIPS).
"""

import numpy as np
import pytest

from invert import Disk, SmoothnessPrior, truncation_degree


def test_point_variance_matches_prior_draws(rng):
    # Point variance about the mean level = tau^2 sum_{n>=1} (1+n^2)^-s on the circle
    # (Borovitskiy et al. 2020, NeurIPS). Monte Carlo with 20000 draws: relative sd of a
    # variance estimate is sqrt(2/20000) = 1 %, so 5 % is > 4 sd.
    d = Disk(1.0, (0, 0), 200)
    prior = SmoothnessPrior(s=1.5, tau=2.0)
    v = prior.variances(d.eigenvalues, d.degrees)
    v[0] = 0.0
    c = np.sqrt(v) * rng.standard_normal((20000, d.n_coef))
    u = c @ d.design(d.from_polar(1.0, [0.3, 2.0])).T
    expected = 4.0 * np.sum((1 + np.arange(1, 100001) ** 2.0) ** -1.5)
    assert prior.point_variance(d) == pytest.approx(expected, rel=1e-12)
    np.testing.assert_allclose(u.var(axis=0), expected, rtol=0.05)
    # covariance between two rim points: sum v_n cos(n (theta1 - theta2)) (stationarity)
    n = np.arange(1, 201)
    cov12 = 4.0 * np.sum((1 + n**2.0) ** -1.5 * np.cos(n * 1.7))
    assert np.cov(u.T)[0, 1] == pytest.approx(cov12, abs=0.05 * expected)


def test_rougher_prior_for_smaller_s(rng):
    # Smaller s puts more variance in high degrees: the mean squared rim increment between
    # neighbouring angles grows as s falls (Matern nu = s - 1/2 ordering of roughness).
    d = Disk(1.0, (0, 0), 128)
    rough = []
    for s in (1.0, 2.0, 3.0):
        var = SmoothnessPrior(s=s).variances(d.eigenvalues, d.degrees)
        var[0] = 0
        var = var / var.sum()
        c = np.sqrt(var) * rng.standard_normal((2000, d.n_coef))
        pts, _ = d.rim_grid(256)
        u = c @ d.design(pts).T
        rough.append(np.mean(np.diff(u, axis=1) ** 2))
    assert rough[0] > rough[1] > rough[2]


def test_truncation_degree_leaves_small_tail():
    # By construction the omitted share of rim variance is below tol and the share one degree
    # lower is not (direct sum).
    d = Disk(1.0, (0, 0), 0)
    for s in (1.5, 2.0, 3.0):
        N = truncation_degree(d, s, tol=1e-4, minimum=1, maximum=100000)
        n = np.arange(1, 2_000_001, dtype=float)
        w = (1 + n**2) ** -s
        share = lambda k: w[k:].sum() / w.sum()  # noqa: E731
        assert share(N) <= 1e-4 < share(N - 1)


def test_invalid_settings():
    with pytest.raises(ValueError, match="'s' parameter must be a float > 0.5"):
        SmoothnessPrior(s=0.4)
    with pytest.raises(ValueError, match="'tau'"):
        SmoothnessPrior(tau=-1)
