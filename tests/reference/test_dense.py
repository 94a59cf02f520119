"""Dense sensing: the economy (blocked, coefficient-space) routes against dense references.

References outside the code paths under test: numpy's full SVD of the same standard-form
matrix, the textbook REML projection P = C^-1 - C^-1 X (X' C^-1 X)^-1 X' C^-1 formed by
Cholesky (Harville 1977, JASA 72:320), and the full-SVD / m x m routes of the package kept as
independent checks (``economy_route`` patched off, ``CollapsedModel(reduce=False)``).
"""

import warnings

import numpy as np
import pytest
from scipy import linalg

import invert.diagnostics.contrasts as contrasts_mod
import invert.stages._spectrum as spectrum_mod
from invert import LinearProblem, SmoothnessPrior
from invert.diagnostics.model_check import model_check
from invert.stages._spectrum import Spectrum
from invert.stages.mcmc.collapsed import CollapsedModel
from invert.workflow import make_domain, run_stage

RULES = ("evidence", "gcv", "loo", "lcurve", "discrepancy", "upre")


def dense_problem(rng, m, known=True, source=0.0):
    """Rim and interior readings of a smooth field (SYNTHETIC), m well above p = 45."""
    d = make_domain(1.0, s=2.0)
    th = rng.uniform(0, 2 * np.pi, m)
    rho = np.where(rng.random(m) < 0.7, 1.0, rng.uniform(0.0, 0.9, m))
    pts = np.column_stack([rho * np.cos(th), rho * np.sin(th)])
    c = np.zeros(d.n_coef)
    c[[0, 1, 4, 7]] = [20.0, 1.0, 0.3, -0.1]
    sig = rng.uniform(0.03, 0.08, m)
    y = d.field(c, pts) + sig * rng.standard_normal(m) + source * (1 - rho**2)
    return LinearProblem(d.design(pts), y, sig if known else None, d.degrees, d.eigenvalues,
                         d, points=pts)


def dense_route(monkeypatch):
    """Patch the size rule so that every factorisation takes the full (m x m) route."""
    monkeypatch.setattr(spectrum_mod, "economy_route", lambda m, p: False)
    monkeypatch.setattr(contrasts_mod, "economy_route", lambda m, p: False)


def test_spectrum_matches_full_svd(rng):
    # numpy's full SVD of the same standard form (an m x m U): every spectral quantity, the
    # per-reading hat diagonal and residuals, coefficients and covariance. 1e-10 relative:
    # both are backward-stable factorisations of a matrix with condition ~1e6 (the broad
    # mean level); observed differences are ~1e-13.
    prob = dense_problem(rng, 400)
    dsd = np.sqrt(SmoothnessPrior(2.0).shape(prob.eigenvalues, prob.degrees))
    spec = Spectrum(prob, dsd, block=64)  # many blocks
    A = (prob.weights[:, None] * prob.G) * dsd
    U, s, Vt = np.linalg.svd(A, full_matrices=True)
    yt = prob.weights * prob.y
    beta = U[:, :len(s)].T @ yt
    alpha = np.logspace(-4, 4, 9)
    f = s[:, None] ** 2 / (s[:, None] ** 2 + alpha)
    np.testing.assert_allclose(spec.s, s, rtol=1e-10)
    np.testing.assert_allclose(np.abs(spec.beta), np.abs(beta), rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(spec.r_perp2, np.sum((U[:, len(s):].T @ yt) ** 2), rtol=1e-10)
    np.testing.assert_allclose(spec.residual2(alpha),
                               np.sum(((1 - f) * beta[:, None]) ** 2, 0) + spec.r_perp2,
                               rtol=1e-10)
    np.testing.assert_allclose(spec.hat_diag(alpha), (U[:, :len(s)] ** 2) @ f, rtol=1e-10)
    np.testing.assert_allclose(spec.residuals(alpha), yt[:, None] - U[:, :len(s)] @ (
        f * beta[:, None]), rtol=1e-10, atol=1e-10 * np.abs(yt).max())
    for a in alpha[[2, 6]]:
        x = Vt.T @ (s / (s**2 + a) * beta)
        np.testing.assert_allclose(spec.coef(a), dsd * x, rtol=1e-10, atol=1e-12)
        cov = dsd[:, None] * (Vt.T / (s**2 + a)) @ Vt * dsd[None, :]
        np.testing.assert_allclose(spec.cov(a), cov, rtol=1e-10, atol=1e-10 * np.abs(cov).max())


@pytest.mark.parametrize("known", [True, False])
def test_every_stage_equals_the_full_route(rng, monkeypatch, known):
    # Same fits through the economy route and the full-SVD route (the computation used before
    # the economy route existed). Chosen lam: the searches stop at xatol 1e-6 in log lam, so
    # the choice may move by that much; means and sd at 1e-10 given the same lam (fixed rule).
    prob = dense_problem(rng, 300, known=known)
    rules = RULES if known else ("evidence", "gcv", "loo", "lcurve")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        new = {r: run_stage(prob, "tikhonov", rule=r) for r in rules}
        gnew = run_stage(prob, "gaussian")
        dense_route(monkeypatch)
        old = {r: run_stage(prob, "tikhonov", rule=r) for r in rules}
        gold = run_stage(prob, "gaussian")
    pts = prob.points[:50]
    for r in rules:
        assert new[r].info["lam"] == pytest.approx(old[r].info["lam"], rel=1e-5), r
        a = run_stage(prob, "tikhonov", rule="fixed", lam=new[r].info["lam"],
                      noise_sd=None if known else new[r].noise_sd)
        monkeypatch.undo()
        b = run_stage(prob, "tikhonov", rule="fixed", lam=new[r].info["lam"],
                      noise_sd=None if known else new[r].noise_sd)
        dense_route(monkeypatch)
        sa, sb = a.at(pts), b.at(pts)
        np.testing.assert_allclose(sb.mean, sa.mean, rtol=1e-10)
        np.testing.assert_allclose(sb.sd, sa.sd, rtol=1e-10)
    assert gnew.info["s"] == pytest.approx(gold.info["s"], rel=1e-3)  # xatol 1e-4 in s
    assert gnew.info["log_evidence"] == pytest.approx(gold.info["log_evidence"], rel=1e-10)


@pytest.mark.parametrize("known", [True, False])
def test_model_check_matches_textbook_projection(rng, known):
    # P0 from the textbook formula (dense Cholesky of C = G1 P G1' + diag(sigma^2)) at the
    # scale the check used (refit=False: the estimate's tau and noise). LOO z to 1e-10
    # absolute (they are O(1)); chi2 from mean-centred readings (P0 X0 = 0), so that the
    # reference itself does not cancel the 20-degree mean level; 1e-10 relative.
    prob = dense_problem(rng, 300, known=known, source=0.05)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = run_stage(prob, "tikhonov")
        chk = model_check(est, prob, refit=False)
    d = prob.domain
    v = SmoothnessPrior(est.prior.s, est.prior.tau).variances(d.eigenvalues, d.degrees)
    fx = d.degrees == 0
    sig = prob.sigma if known else np.full(prob.n_readings, est.noise_sd)
    G, y, m = prob.G, prob.y, prob.n_readings
    Ci = linalg.cho_solve(linalg.cho_factor((G[:, ~fx] * v[~fx]) @ G[:, ~fx].T
                                            + np.diag(sig**2)), np.eye(m))
    CiX = Ci @ G[:, fx]
    P = Ci - CiX @ np.linalg.solve(G[:, fx].T @ CiX, CiX.T)
    yc = y - y.mean()
    Py, dP = P @ yc, np.diag(P)
    np.testing.assert_allclose(chk.loo_z, Py / np.sqrt(dP), rtol=0, atol=1e-10)
    np.testing.assert_allclose(chk.loo_sd, 1 / np.sqrt(dP), rtol=1e-10)
    np.testing.assert_allclose(chk.loo_mean, y - Py / dP, rtol=1e-10)
    src = 1 - np.hypot(*prob.points.T) ** 2
    src[src < 1e-3] = 0.0
    assert chk.source_excess == pytest.approx(src @ Py / (src @ P @ src), rel=1e-9)
    if known:
        assert chk.chi2 == pytest.approx(yc @ Py, rel=1e-10)


def test_model_check_refit_equals_the_m_by_m_route(rng, monkeypatch):
    # The REML search on the economy contrasts against the m x m eigendecomposition route.
    # tau is found by bounded Brent at xatol 1e-8 in log x, so it agrees to ~1e-8; the
    # statistics given it follow at that level.
    prob = dense_problem(rng, 300, source=0.05)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = run_stage(prob, "tikhonov")
        new = model_check(est, prob)
        dense_route(monkeypatch)
        old = model_check(est, prob)
    assert new.tau == pytest.approx(old.tau, rel=1e-7)
    assert new.chi2 == pytest.approx(old.chi2, rel=1e-7)
    assert new.source_pvalue == pytest.approx(old.source_pvalue, rel=1e-6)
    np.testing.assert_allclose(new.loo_z, old.loo_z, atol=1e-6)


def test_collapsed_reduction_equals_data_space(rng):
    # Coefficient-space reduction vs the m x m data-space route, per hyperparameter row.
    # LOO moments and conditional means at 1e-10; the log density at 1e-9 as the spectral
    # vs data-space check in test_mcmc (the broad mean level's Woodbury step cancels ~5
    # digits of the whitened 20-degree level in the data-space reference).
    prob = dense_problem(rng, 300)
    a, b = CollapsedModel(prob), CollapsedModel(prob, reduce=False)
    tau, s = np.array([0.5, 1.0, 2.0]), np.array([1.8, 2.5, 3.2])
    nv = np.array([[1.0], [1.3], [0.7]])
    np.testing.assert_allclose(a.loglik(tau, s, nv), b.loglik(tau, s, nv), rtol=1e-9)
    for x, y in zip(a.loo_moments(tau, s, nv), b.loo_moments(tau, s, nv), strict=True):
        np.testing.assert_allclose(x, y, rtol=1e-10)
    np.testing.assert_allclose(a.conditional(tau, s, nv, rng=0)[0],
                               b.conditional(tau, s, nv, rng=0)[0], rtol=1e-10, atol=1e-12)
    assert a._K2 is None  # no m x m block was formed


def test_hundred_thousand_readings(rng, monkeypatch):
    # 100,000 readings: 400 distinct readings, each repeated 250 times with sigma * sqrt(250).
    # The repeated problem has the same G'WG and G'Wy, hence (at a fixed lam, and for the
    # Gaussian stage at fixed s and tau) the same posterior as the 400 readings, computed
    # here by the m x m full-SVD route; 1e-10 relative (observed ~1e-13). The LOO rule's
    # blocked sums are checked against one block (same formula, other summation order).
    base = dense_problem(rng, 400)
    k = 250
    rep = LinearProblem(np.tile(base.G, (k, 1)), np.tile(base.y, k),
                        np.tile(base.sigma * np.sqrt(k), k), base.degrees, base.eigenvalues,
                        base.domain, points=np.tile(base.points, (k, 1)))
    assert rep.n_readings == 100_000
    pts = base.points[:40]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for opts in ({"method": "tikhonov", "rule": "fixed", "lam": 0.3},
                     {"method": "gaussian", "fix_s": True, "tau": 0.7}):
            method = opts.pop("method")
            dense_route(monkeypatch)
            small = run_stage(base, method, **opts)
            monkeypatch.undo()
            big = run_stage(rep, method, **opts)
            np.testing.assert_allclose(big.at(pts).mean, small.at(pts).mean, rtol=1e-10)
            np.testing.assert_allclose(big.at(pts).sd, small.at(pts).sd, rtol=1e-10)
        est = run_stage(rep, "tikhonov", rule="loo")
        chk = model_check(est, rep)
    assert np.isfinite(chk.loo_z).all() and chk.loo_z.shape == (100_000,)
    dsd = np.sqrt(SmoothnessPrior(2.0).shape(rep.eigenvalues, rep.degrees))
    grid = np.logspace(-3, 3, 7)
    np.testing.assert_allclose(Spectrum(rep, dsd).loo_mean_square(grid),
                               Spectrum(rep, dsd, block=rep.n_readings).loo_mean_square(grid),
                               rtol=1e-10)
    # The collapsed model on the repeated readings: the same conditional mean as on the 400.
    tau, s, nv = np.array([0.7]), np.array([2.0]), np.array([[1.0]])
    np.testing.assert_allclose(CollapsedModel(rep, spectral=False).conditional(tau, s, nv)[0],
                               CollapsedModel(base, reduce=False, spectral=False)
                               .conditional(tau, s, nv)[0], rtol=1e-10, atol=1e-12)
