"""StaticInverter: stacked per-pattern factorisations and grouped products, against a direct
solve of each frame.

Oracle: the Tikhonov problem of one frame, min ||W_o(G_o c - y_o)||^2 + lam ||D^-1 c||^2, solved
as an ordinary least-squares problem on the stacked matrix [W_o G_o D; sqrt(lam) I] with
numpy.linalg.lstsq (Hansen, Discrete Inverse Problems, SIAM 2010, §4.1: Tikhonov as a stacked
least-squares problem); its covariance noise_var (X^T X)^-1 from the R factor of numpy's QR of
the same stacked matrix X (Gaussian posterior of the linear model, Bishop 2006 §3.3).
"""

import numpy as np
import pytest

from invert.batch.runner import StaticInverter
from invert.geometry.disk import Disk
from invert.prior import SmoothnessPrior
from invert.workflow import make_domain


def _reference(inv, y):
    """Query means, sds, centre mean/sd and chi2 of one frame by stacked least squares."""
    obs = np.isfinite(y)
    G = inv.G[obs]
    w = np.ones(obs.sum()) if inv.sigma is None else 1.0 / inv.sigma[obs]
    d = np.sqrt(SmoothnessPrior(s=inv.s).shape(inv.domain.eigenvalues, inv.domain.degrees))
    p = len(d)
    X = np.vstack([(w[:, None] * G) * d[None, :], np.sqrt(inv.lam) * np.eye(p)])
    rhs = np.concatenate([w * y[obs], np.zeros(p)])
    x = np.linalg.lstsq(X, rhs, rcond=None)[0]
    c = d * x
    R = np.linalg.qr(X, mode="r")
    H = np.vstack([inv.Hq, np.eye(p)[:1]]) * d[None, :]   # query rows and the mean level a0
    Z = np.linalg.solve(R.T, H.T)                          # R^-T (D h): variances as norms
    sd = np.sqrt(inv.noise_var * np.sum(Z**2, axis=0))
    mean = np.vstack([inv.Hq, np.eye(p)[:1]]) @ c
    chi2 = np.sum((w * (y[obs] - G @ c)) ** 2) / inv.noise_var
    return mean, sd, chi2


def _frames(rng, n_sensors, n_frames, dominant):
    """Smooth rim field plus noise; drop-out patterns from full frames to single readings."""
    th = np.linspace(0, 2 * np.pi, n_sensors, endpoint=False)
    Y = 20 + 2 * np.cos(th - rng.uniform(0, 6, (n_frames, 1))) \
        + 0.05 * rng.standard_normal((n_frames, n_sensors))
    for i in range(n_frames):
        if dominant and rng.random() < 0.6:
            continue                                   # the common (full) pattern
        if dominant and rng.random() < 0.5:
            Y[i, rng.integers(n_sensors)] = np.nan     # a few single drop-outs, often shared
            continue
        k = rng.integers(1, n_sensors)                 # 1 .. n-1 missing (down to 1 reading)
        Y[i, rng.choice(n_sensors, k, replace=False)] = np.nan
    return Y


@pytest.mark.parametrize("case", ["more-coefficients", "more-sensors", "co-located"])
@pytest.mark.parametrize("dominant", [True, False])
def test_solve_equals_direct_least_squares_per_frame(case, dominant):
    # Both product routes (one pattern shared by most frames / every pattern on its own rows)
    # and both shapes (fewer readings than coefficients, and more: 28 sensors, 17 columns);
    # co-located sensors with equal sigma make the whitened design rank-deficient, which
    # exercises the rank cut-off (a zero singular value goes to the prior-only part).
    rng = np.random.default_rng(3 if dominant else 4)
    if case == "more-coefficients":
        dom, n = make_domain(1.0), 32
        th = np.linspace(0, 2 * np.pi, n, endpoint=False)
        pts, sigma, lam, noise_sd = np.c_[np.cos(th), np.sin(th)], None, 0.01, 0.05
    elif case == "co-located":
        dom, n = Disk(1.0, (0.0, 0.0), 12), 18
        th = np.linspace(0, 2 * np.pi, 16, endpoint=False)
        pts = np.c_[np.cos(th), np.sin(th)]
        pts = np.vstack([pts, pts[[0, 5]]])
        sigma, lam, noise_sd = np.full(n, 0.05), 0.05, None
    else:
        dom, n = Disk(1.0, (0.0, 0.0), 8), 28
        th = np.linspace(0, 2 * np.pi, 24, endpoint=False)
        inner = [[0.3, 0.1], [-0.2, 0.4], [0.0, -0.5], [0.6, 0.0]]
        pts = np.vstack([np.c_[np.cos(th), np.sin(th)], inner])
        sigma, lam, noise_sd = rng.uniform(0.03, 0.1, n), 0.3, None
    query = np.array([[0.0, 0.0], [0.5, 0.2], [-0.3, -0.6], [0.9, 0.1]])
    inv = StaticInverter(dom, pts, sigma, lam, noise_sd, query)
    Y = _frames(rng, n, 300, dominant)
    qm, qs, cm, cs, chi2 = inv.solve(Y)
    for i in range(len(Y)):
        mean, sd, c2 = _reference(inv, Y[i])
        # means: the stacked matrix has condition ~ 1e6 here (flat mean-level prior, sd 1e4),
        # so the reference itself carries ~1e-10 relative error; values are O(20)
        np.testing.assert_allclose(qm[i], mean[:-1], rtol=1e-9, atol=1e-9)
        assert cm[i] == pytest.approx(mean[-1], rel=1e-9)
        # sds through R^-T of the same stacked matrix: same conditioning argument
        np.testing.assert_allclose(qs[i], sd[:-1], rtol=1e-8)
        assert cs[i] == pytest.approx(sd[-1], rel=1e-8)
        # chi2 is a difference of O(y) quantities (residual O(noise)): absolute tolerance
        assert chi2[i] == pytest.approx(c2, rel=1e-6, abs=1e-6)


def test_patterns_cached_across_calls_and_evicted():
    # a pattern seen before is not factorised again; a small cache drops the oldest patterns
    # and refactorises them later with the same numbers (to rounding)
    rng = np.random.default_rng(8)
    dom = make_domain(1.0)
    th = np.linspace(0, 2 * np.pi, 12, endpoint=False)
    pts = np.c_[np.cos(th), np.sin(th)]
    Y = _frames(rng, 12, 60, dominant=False)
    first = StaticInverter(dom, pts, None, 0.1, 0.1, [[0.0, 0.0]])
    a = first.solve(Y)
    n_patterns = len(np.unique(np.isfinite(Y), axis=0))
    assert first.n_factorised == n_patterns
    b = first.solve(Y)
    assert first.n_factorised == n_patterns
    small = StaticInverter(dom, pts, None, 0.1, 0.1, [[0.0, 0.0]], max_patterns=3)
    parts = [small.solve(Y[i:i + 7]) for i in range(0, len(Y), 7)]
    assert len(small._cache) <= 3
    # a memory budget of 2 entries (14 x 12 float64 + 2 sds each) caps the cache the same way
    tight = StaticInverter(dom, pts, None, 0.1, 0.1, [[0.0, 0.0]], cache_bytes=2 * 8 * 170)
    assert tight.max_patterns == 2
    np.testing.assert_allclose(tight.solve(Y)[0], a[0], rtol=1e-12, atol=1e-12)
    assert len(tight._cache) <= 2
    for x, y in zip(a, b, strict=True):
        np.testing.assert_array_equal(x, y)
    for j in range(5):
        np.testing.assert_allclose(np.concatenate([p[j] for p in parts]), a[j], rtol=1e-12,
                                   atol=1e-12)
    # every frame once more, one by one (each call's single pattern on the whole block)
    for i in range(0, len(Y), 11):
        one = first.solve(Y[i:i + 1])
        np.testing.assert_allclose(one[0][0], a[0][i], rtol=1e-12)
