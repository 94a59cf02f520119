"""Block cross-validated scale of the averaged posterior (invert.stages.cv_scale).

References outside the module:
- the posterior predictive of a Gaussian linear model, y_B | y_-B ~ N(G_B m, G_B S G_B^T + R_B)
  with S = (G^T R^-1 G + V^-1)^-1, m = S G^T R^-1 y (Bishop, Pattern Recognition and Machine
  Learning, 2006, eqs. 3.53-3.54 and 3.58), formed here in information form with numpy;
- the marginal likelihood log N(y; 0, G V G^T + R) by the Woodbury identity and the matrix
  determinant lemma (Bishop eq. 3.86), for the re-weighting of the components without a block;
- E[min(Z^2, c)] for a standard normal Z by scipy.integrate.quad.
"""

import numpy as np
import pytest
from scipy import integrate, stats

from invert import LinearProblem
from invert.stages import cv_scale  # its block choice sets up the checks
from invert.stages.averaged import AveragedPosterior
from invert.stages.cv_scale import WINSOR, block_scale, held_out
from invert.workflow import make_domain


def _problem(seed=0, n_rim=14, n_modes=12):
    d = make_domain(1.0).with_modes(n_modes)
    rng = np.random.default_rng(seed)
    pts = np.vstack([d.from_polar(1.0, np.sort(rng.uniform(0, 2 * np.pi, n_rim))),
                     d.from_polar(0.4, np.array([0.3, 2.0]))])
    G = d.design(pts)
    sig = 0.1 * rng.uniform(0.5, 2, len(pts))
    y = G @ (rng.standard_normal(d.n_coef) / (1 + d.degrees) ** 2) + sig * rng.standard_normal(
        len(pts))
    return LinearProblem(G, y, sig, d.degrees, d.eigenvalues, d, points=pts), G, y, sig


def _components(pb):
    st = AveragedPosterior(calibrate=False)
    mode, _, noise = st._mode(pb)
    return st._components(pb, mode, noise)


def _information(Gs, ys, Rs, v):
    Sinv = Gs.T @ (Gs / Rs[:, None]) + np.diag(1 / v)
    return Sinv, Gs.T @ (ys / Rs)


def _log_marginal(Gs, ys, Rs, v):
    Sinv, b = _information(Gs, ys, Rs, v)
    L = np.linalg.cholesky(Sinv)
    q = ys @ (ys / Rs) - b @ np.linalg.solve(Sinv, b)
    logdet = np.sum(np.log(Rs)) + np.sum(np.log(v)) + 2 * np.sum(np.log(np.diag(L)))
    return -0.5 * (q + logdet + len(ys) * np.log(2 * np.pi))


def _predictive(Gs, ys, Rs, v, Gb, Rb):
    Sinv, b = _information(Gs, ys, Rs, v)
    S = np.linalg.inv(Sinv)
    return Gb @ (S @ b), np.einsum("ij,jk,ik->i", Gb, S, Gb) + Rb


def _reference(G, y, sig, comps, B):
    """Held-out error and sd (whitened) of block B under a mixture of (row, index, weight)."""
    rest = np.setdiff1d(np.arange(len(y)), B)
    lw, mus, vs = [], [], []
    for row, i, wk in comps:
        v = row[4][i] / row[2][i] * row[1].d ** 2  # tau^2 d^2, tau^2 = nu^2 / alpha
        R = row[4][i] * sig**2
        lw.append(np.log(wk) + _log_marginal(G[rest], y[rest], R[rest], v)
                  - _log_marginal(G, y, R, v))
        mu, c = _predictive(G[rest], y[rest], R[rest], v, G[B], R[B])
        mus.append(mu / sig[B])
        vs.append(c / sig[B] ** 2)
    lw = np.array(lw)
    w = np.exp(lw - lw.max())
    w /= w.sum()
    m = sum(wi * mu for wi, mu in zip(w, mus))
    var = sum(wi * (c + mu**2) for wi, c, mu in zip(w, vs, mus)) - m**2
    return y[B] / sig[B] - m, np.sqrt(var)


@pytest.mark.parametrize("comps", [[(2, 30, 1.0)], [(1, 25, 0.3), (3, 35, 0.7)]])
def test_held_out_equals_the_posterior_predictive(comps):
    # One component, and a mixture re-weighted without the block. Tolerance: the references
    # solve with the mean level's prior sd of 1e4 (condition number ~1e13 in reading space,
    # ~1e8 in information form): agreement to ~1e-7 relative is what double precision allows.
    pb, G, y, sig = _problem()
    rows = _components(pb)
    blocks = cv_scale._blocks(pb.points, 4)
    weights = [np.zeros_like(r[2]) for r in rows]
    for k, i, w in comps:
        weights[k][i] = w
    err, sd = held_out(rows, weights, blocks)
    for n, B in enumerate(blocks):
        e_ref, sd_ref = _reference(G, y, sig, [(rows[k], i, w) for k, i, w in comps], B)
        np.testing.assert_allclose(err[n], e_ref, rtol=1e-6, atol=1e-7)
        np.testing.assert_allclose(sd[n], sd_ref, rtol=1e-6)


def test_winsorised_chi2_mean():
    # E[min(Z^2, c)] by quadrature (scipy), against the closed form P(chi2_3 < c) + c P(|Z|>r).
    c = WINSOR
    r = np.sqrt(c)
    ref = 2 * integrate.quad(lambda z: z**2 * stats.norm.pdf(z), 0, r)[0] + c * 2 * stats.norm.sf(r)
    assert cv_scale._winsorised_chi2_mean(c) == pytest.approx(ref, rel=1e-10)


def test_prior_draws_with_many_sensors_leave_the_posterior_unchanged():
    # Readings drawn from the prior the stage averages over (s = 2), 60 rim sensors: the
    # held-out errors are as the posterior says, the factor stays 1 and the estimate equals
    # the uncalibrated one exactly; a chance excess over the threshold (twice the sd of the
    # mean of z^2) is allowed in at most 2 of 20 seeded draws (about 2.5 % each).
    d = make_domain(1.0).with_modes(24)
    widened = 0
    for seed in range(20):
        rng = np.random.default_rng(100 + seed)
        v = 1.0 / (1.0 + d.degrees) ** 4  # s = 2, tau = 1
        c = np.sqrt(v) * rng.standard_normal(d.n_coef)
        pts = d.from_polar(1.0, np.linspace(0, 2 * np.pi, 60, endpoint=False))
        y = d.design(pts) @ c + 0.05 * rng.standard_normal(len(pts))
        pb = LinearProblem(d.design(pts), y, np.full(len(pts), 0.05), d.degrees,
                           d.eigenvalues, d, points=pts)
        est = AveragedPosterior().fit(pb)
        ref = AveragedPosterior(calibrate=False).fit(pb)
        cal = est.info["calibration"]
        if cal["factor"] > 1:
            widened += 1
            continue
        np.testing.assert_array_equal(est.cov, ref.cov)
        np.testing.assert_array_equal(est.mean, ref.mean)
    assert widened <= 2


def test_a_near_rim_source_widens_the_intervals():
    # A line source at 1.05 R beside a ring of 24 sensors (a field outside every smoothness
    # prior of the grid): the held-out readings are predicted worse than the posterior says,
    # the factor exceeds its threshold and multiplies the covariance; the mean is unchanged.
    d = make_domain(1.0)
    th = np.linspace(0, 2 * np.pi, 24, endpoint=False)
    pts = np.vstack([d.from_polar(1.0, th), d.from_polar(0.5, th[::6] + 0.3)])
    x0 = np.array([1.05 * np.cos(0.13), 1.05 * np.sin(0.13)])
    rng = np.random.default_rng(4)
    y = -np.log(np.hypot(*(pts - x0).T)) + 0.01 * rng.standard_normal(len(pts))
    pb = LinearProblem(d.design(pts), y, np.full(len(pts), 0.01), d.degrees, d.eigenvalues, d,
                       points=pts)
    est = AveragedPosterior().fit(pb)
    ref = AveragedPosterior(calibrate=False).fit(pb)
    cal = est.info["calibration"]
    assert cal["factor"] > cal["threshold"]
    np.testing.assert_allclose(est.cov, cal["factor"] * ref.cov, rtol=1e-12)
    np.testing.assert_array_equal(est.mean, ref.mean)


def test_too_few_readings_or_no_points_skip_the_check():
    pb, *_ = _problem(n_rim=4)  # 6 readings
    assert block_scale(pb, _components(pb), None) is None
