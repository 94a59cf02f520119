"""Tests of the MCMC stage: collapsed likelihood, exact conditional draws, emcee vs closed form,
faulty sensors, angle error, arviz diagnostics, seeding and the command line.

Oracles: scipy.stats.multivariate_normal (marginal likelihood), the Gaussian linear-model
posterior (Bishop 2006, PRML eqs. 3.53-3.54), brute-force leave-one-out conditioning
(Sundararajan & Keerthi 2001), arviz's own rhat_nested/ess/mcse/loo, and seeded simulations with
known truth (Hogg, Bovy & Lang 2010 for the faulty-sensor model).
"""

import subprocess
import sys
import warnings

import arviz as az
import numpy as np
import pytest
from scipy import stats

from invert import (
    Disk,
    GaussianPosterior,
    LinearProblem,
    MCMCSampler,
    MCMCWarning,
    SmoothnessPrior,
)
from invert.stages.mcmc.collapsed import CollapsedModel
from invert.workflow import fit_stage


def _scenario(rng, *, n_modes=8, n_rim=16, n_probe=2, sigma=0.1, known=True, s_true=2.0,
              gap=0.0, n_test=5):
    """Truth from the prior (s_true, tau = 1, mean level 20 +- 1); rim ring plus probes."""
    d = Disk(1.0, (0.0, 0.0), n_modes)
    v = SmoothnessPrior(s=s_true).variances(d.eigenvalues, d.degrees)
    v[0] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    c[0] += 20.0
    th = np.linspace(0, 2 * np.pi, n_rim, endpoint=False) + rng.uniform(0, 2 * np.pi)
    keep = np.mod(th - th[0], 2 * np.pi) >= 2 * np.pi * gap if gap else np.ones(n_rim, bool)
    pts = np.vstack([d.from_polar(1.0, th[keep]),
                     d.from_polar(rng.uniform(0.2, 0.7, n_probe),
                                  rng.uniform(0, 2 * np.pi, n_probe))])
    G = d.design(pts)
    y = G @ c + sigma * rng.standard_normal(len(pts))
    names = np.array([f"S{i:02d}" for i in range(len(pts))])
    prob = LinearProblem(G, y, np.full(len(pts), sigma) if known else None, d.degrees,
                         d.eigenvalues, d, sensor=names, points=pts)
    test = d.from_polar(rng.uniform(0, 0.9, n_test), rng.uniform(0, 2 * np.pi, n_test))
    return prob, test, d.design(test) @ c


def _query_draws(est, points):
    """Query values per (chain, draw, point) from the arviz posterior."""
    coef = est.extras["posterior"]["posterior"]["coef"].values
    return coef @ est.domain.design(points).T


def _assert_matches_gaussian(draws, mean, sd, k=4.0):
    """Sampler mean and sd within k Monte Carlo standard errors (arviz mcse, which uses the
    effective sample size) of the exact values: the reusable check of STYLE.md §6."""
    mc_mean = az.mcse(draws, method="mean", chain_axis=0, draw_axis=1)
    mc_sd = az.mcse(draws, method="sd", chain_axis=0, draw_axis=1)
    got_mean = draws.mean(axis=(0, 1))
    got_sd = draws.std(axis=(0, 1), ddof=1)
    assert np.all(np.abs(got_mean - mean) < k * mc_mean), (got_mean - mean, mc_mean)
    assert np.all(np.abs(got_sd - sd) < k * mc_sd), (got_sd - sd, mc_sd)


@pytest.fixture
def rng():
    return np.random.default_rng(42)


# --- collapsed marginal likelihood and exact conditional draws --------------------------------
@pytest.mark.parametrize("known", [True, False])
def test_collapsed_loglik_equals_scipy(rng, known):
    # scipy.stats.multivariate_normal.logpdf of y under the prior predictive N(0, G P G^T + N),
    # to 1e-8 (relative; algebra). A broad-mean scale of 3 keeps the dense covariance well
    # conditioned for scipy's eigendecomposition; rows 0 and 3 get a larger ("faulty") variance.
    prob, _, _ = _scenario(rng, known=known)
    cm = CollapsedModel(prob, mean_scale=3.0)
    tau = np.array([0.7, 1.3, 2.0])
    s = np.array([1.5, 2.5, 4.0])
    nv = np.tile(np.array([0.8, 1.0, 1.5])[:, None] ** 2, (1, prob.n_readings))
    nv[:, [0, 3]] = 30.0**2
    got = cm.loglik(tau, s, nv)
    w2 = 1.0 / prob.weights**2
    for i in range(3):
        P = np.diag(SmoothnessPrior(s=s[i], tau=tau[i], mean_scale=3.0)
                    .variances(prob.eigenvalues, prob.degrees))
        C = prob.G @ P @ prob.G.T + np.diag(nv[i] * w2)
        ref = stats.multivariate_normal(np.zeros(prob.n_readings), C).logpdf(prob.y)
        assert got[i] == pytest.approx(ref, rel=1e-8, abs=1e-8)


def test_spectral_route_equals_scipy_and_the_per_row_route(rng):
    # One s and one common noise level for the whole batch: the one-SVD route gives
    # scipy.stats.multivariate_normal.logpdf of the prior predictive (1e-8, algebra) and the
    # same log density, leave-one-out moments and conditional means as the per-row Cholesky
    # route (1e-9).
    prob, _, _ = _scenario(rng, known=True)
    fast = CollapsedModel(prob, mean_scale=3.0)
    slow = CollapsedModel(prob, mean_scale=3.0, spectral=False)
    tau = np.array([0.4, 1.0, 2.5, 7.0])
    s = np.full(4, 2.5)
    nv = np.array([[0.5], [1.0], [1.3], [3.0]]) ** 2
    got = fast.loglik(tau, s, nv)
    assert fast._spectra and not slow._spectra
    for i in range(4):
        P = np.diag(SmoothnessPrior(s=2.5, tau=tau[i], mean_scale=3.0)
                    .variances(prob.eigenvalues, prob.degrees))
        C = prob.G @ P @ prob.G.T + np.diag(nv[i, 0] * prob.sigma**2)
        ref = stats.multivariate_normal(np.zeros(prob.n_readings), C).logpdf(prob.y)
        assert got[i] == pytest.approx(ref, rel=1e-8, abs=1e-8)
    np.testing.assert_allclose(got, slow.loglik(tau, s, nv), rtol=1e-9)
    for a, b in zip(fast.loo_moments(tau, s, nv), slow.loo_moments(tau, s, nv), strict=True):
        np.testing.assert_allclose(a, b, rtol=1e-9)
    np.testing.assert_allclose(fast.conditional(tau, s, nv, rng=0)[0],
                               slow.conditional(tau, s, nv, rng=0)[0], rtol=1e-9, atol=1e-9)
    # Rows with their own s or noise level take the per-row route and still agree.
    mixed_nv = np.tile(nv, (1, prob.n_readings))
    mixed_nv[:, 0] *= 4.0
    np.testing.assert_allclose(fast.loglik(tau, s, mixed_nv), slow.loglik(tau, s, mixed_nv),
                               rtol=1e-12)


def test_integrated_time_equals_emcee():
    # The vectorised estimator equals emcee.autocorr.integrated_time (c = 5) to 1e-12 on AR(1)
    # chains of several shapes (reference library).
    import emcee

    from invert.stages.mcmc.diagnostics import integrated_time

    g = np.random.default_rng(5)
    for shape in [(1000, 32, 1), (1501, 20, 3), (64, 8, 2)]:
        x = g.standard_normal(shape)
        for t in range(1, shape[0]):
            x[t] += 0.8 * x[t - 1]
        ref = emcee.autocorr.integrated_time(x, c=5, tol=0)
        np.testing.assert_allclose(integrated_time(x, c=5), ref, rtol=1e-12)


def test_fitted_student_move_samples_a_skewed_bounded_target():
    # emcee with FittedStudentMove alone on x1 ~ Gamma(3) (scipy.stats.gamma: mean 3, var 3;
    # zero density below 0) and x2 | x1 ~ N(x1, 1) (mean 3, var 4): means and sds within
    # 4 Monte Carlo standard errors of the exact values.
    import emcee

    from invert.stages.mcmc.moves import FittedStudentMove

    def logp(x):
        lp = stats.gamma(3.0).logpdf(x[:, 0]) - 0.5 * (x[:, 1] - x[:, 0]) ** 2
        return np.where(x[:, 0] > 0, lp, -np.inf)

    g = np.random.default_rng(11)
    chains = []
    for k in range(4):
        sampler = emcee.EnsembleSampler(32, 2, logp, vectorize=True, moves=FittedStudentMove())
        state = emcee.State(np.array([3.0, 3.0]) + 0.01 * g.standard_normal((32, 2)),
                            random_state=np.random.RandomState(k).get_state())
        sampler.run_mcmc(state, 3000, progress=False)
        chains.append(np.swapaxes(sampler.get_chain()[500::2], 0, 1))
    draws = np.concatenate(chains)  # (chain = walker, draw, 2)
    _assert_matches_gaussian(draws, np.array([3.0, 3.0]), np.sqrt([3.0, 4.0]))


def test_conditional_draws_are_the_gaussian_posterior(rng):
    # Bishop (2006) eqs. 3.53-3.54 (information form): conditional means to 1e-9 (algebra);
    # the SVD route agrees; variances of 20000 exact draws within 5 sd of their sampling error
    # (relative sd of a variance estimate: sqrt(2/n) = 1 %).
    prob, _, _ = _scenario(rng)
    cm = CollapsedModel(prob)
    tau, s, k = 1.3, 2.2, 1.4
    P = np.diag(cm.prior_var(tau, s)[0])
    Ni = np.diag(1 / (k * prob.sigma) ** 2)
    Sig = np.linalg.inv(np.linalg.inv(P) + prob.G.T @ Ni @ prob.G)
    mu = Sig @ prob.G.T @ Ni @ prob.y
    n = 20000
    mean, draw = cm.conditional(np.full(n, tau), np.full(n, s), np.full((n, 1), k**2), rng=1)
    np.testing.assert_allclose(mean[0], mu, rtol=1e-9, atol=1e-9)
    m2, _ = cm.conditional_svd([tau], [s], [[k**2]], rng=1)
    np.testing.assert_allclose(m2[0], mu, rtol=1e-9, atol=1e-9)
    ratio = draw.var(axis=0, ddof=1) / np.diag(Sig)
    assert np.all(np.abs(ratio - 1) < 5 * np.sqrt(2 / n))
    z = (draw.mean(axis=0) - mu) / np.sqrt(np.diag(Sig) / n)
    assert np.all(np.abs(z) < 5)


def test_loo_moments_equal_brute_force(rng):
    # Leave-one-out predictive of y_i given y_-i (Sundararajan & Keerthi 2001) vs explicit
    # conditioning of the dense Gaussian; algebra, 1e-8.
    prob, _, _ = _scenario(rng, known=True)
    cm = CollapsedModel(prob, mean_scale=3.0)
    ll = cm.loo_loglik([1.1], [2.5], [[1.2**2]])[0]
    P = np.diag(SmoothnessPrior(s=2.5, tau=1.1, mean_scale=3.0)
                .variances(prob.eigenvalues, prob.degrees))
    C = prob.G @ P @ prob.G.T + np.diag((1.2 * prob.sigma) ** 2)
    for i in range(prob.n_readings):
        o = np.arange(prob.n_readings) != i
        A = np.linalg.solve(C[np.ix_(o, o)], C[o, i])
        ref = stats.norm.logpdf(prob.y[i], A @ prob.y[o], np.sqrt(C[i, i] - C[i, o] @ A))
        assert ll[i] == pytest.approx(ref, rel=1e-8, abs=1e-8)


# --- samplers against the closed form ---------------------------------------------------------
def test_fixed_hyperparameters_reproduce_closed_form(rng):
    # emcee over all 9 coefficients with tau, s and the noise held fixed must reproduce the
    # closed-form posterior (Bishop 2006 eqs. 3.53-3.54) of query values: mean and sd within
    # 4 Monte Carlo standard errors. (No points on the problem: its 4 harmonics are kept.)
    prob, test, _ = _scenario(rng, n_modes=4)
    prob = LinearProblem(prob.G, prob.y, prob.sigma, prob.degrees, prob.eigenvalues,
                         prob.domain)
    exact = fit_stage(GaussianPosterior(s=4.0, tau=1.0), prob).at(test)
    est = fit_stage(MCMCSampler(collapsed=False, s=4.0, tau=1.0, rng=1, progress=False,
                      n_draws=4000), prob)
    assert est.info["sampling"]["converged"]
    _assert_matches_gaussian(_query_draws(est, test), exact.mean, exact.sd)


def test_collapsed_sampler_matches_quadrature(rng):
    # s and the noise fixed: the posterior of log tau is 1-D, so the exact query mean and sd
    # follow by quadrature over a fine grid of log tau of the Gaussian conditional moments
    # (Bishop 2006 eqs. 3.53-3.54, law of total variance). The sampler (fitted Student-t and
    # differential-evolution moves) must agree within 4 Monte Carlo standard errors, for the
    # query values and for log tau.
    prob, test, _ = _scenario(rng, n_modes=6)
    # No points on the problem: its 6 harmonics are kept, so both sides use the same design.
    prob = LinearProblem(prob.G, prob.y, prob.sigma, prob.degrees, prob.eigenvalues,
                         prob.domain)
    est = fit_stage(MCMCSampler(s=2.5, rng=3, progress=False, n_draws=8000), prob)
    assert est.info["sampling"]["converged"]
    from invert.stages.mcmc.hyper import Hyper

    hyper = Hyper(prob, (1.0, 5.0), s=2.5)
    cm = CollapsedModel(prob, spectral=False)
    grid = np.linspace(-8, 8, 8001)
    lp = MCMCSampler._logp_collapsed(grid[:, None], hyper, cm)
    w = np.exp(lp - lp.max())
    w /= w.sum()
    H = prob.domain.design(test)
    Ni = 1.0 / prob.sigma**2
    m1 = np.zeros(len(test))
    m2 = np.zeros(len(test))
    for lt, wi in zip(grid[w > 1e-14], w[w > 1e-14], strict=True):
        P = cm.prior_var(np.exp(lt), 2.5)[0]
        Sig = np.linalg.inv(np.diag(1 / P) + prob.G.T @ (Ni[:, None] * prob.G))
        mu = H @ (Sig @ prob.G.T @ (Ni * prob.y))
        m1 += wi * mu
        m2 += wi * (np.einsum("qi,ij,qj->q", H, Sig, H) + mu**2)
    _assert_matches_gaussian(_query_draws(est, test), m1, np.sqrt(m2 - m1**2))
    lt_mean = w @ grid
    lt_sd = np.sqrt(w @ grid**2 - lt_mean**2)
    log_tau = np.log(est.extras["posterior"]["posterior"]["tau"].values)[..., None]
    _assert_matches_gaussian(log_tau, np.array([lt_mean]), np.array([lt_sd]))


@pytest.mark.slow
def test_collapsed_and_full_samplers_agree(rng):
    # Same model (tau and the noise level sampled, s fixed), two samplers: query means and sds
    # agree within 4 combined Monte Carlo standard errors.
    prob, test, _ = _scenario(rng, n_modes=4, known=False, n_rim=14)
    prob = LinearProblem(prob.G, prob.y, None, prob.degrees, prob.eigenvalues, prob.domain)
    a = fit_stage(MCMCSampler(s=4.0, rng=3, progress=False, n_draws=4000), prob)
    b = fit_stage(MCMCSampler(s=4.0, rng=4, progress=False, collapsed=False, n_draws=4000), prob)
    assert a.info["sampling"]["converged"] and b.info["sampling"]["converged"]
    qa, qb = _query_draws(a, test), _query_draws(b, test)
    se_m = np.hypot(az.mcse(qa, method="mean", chain_axis=0, draw_axis=1),
                    az.mcse(qb, method="mean", chain_axis=0, draw_axis=1))
    se_s = np.hypot(az.mcse(qa, method="sd", chain_axis=0, draw_axis=1),
                    az.mcse(qb, method="sd", chain_axis=0, draw_axis=1))
    d_mean = qa.mean(axis=(0, 1)) - qb.mean(axis=(0, 1))
    d_sd = qa.std(axis=(0, 1), ddof=1) - qb.std(axis=(0, 1), ddof=1)
    assert np.all(np.abs(d_mean) < 4 * se_m), (d_mean, se_m)
    assert np.all(np.abs(d_sd) < 4 * se_s), (d_sd, se_s)


# --- seeding, diagnostics and arviz output ---------------------------------------------------
def test_same_seed_same_numbers_and_diagnostics_match_arviz(rng):
    prob, _, _ = _scenario(rng, known=False)
    kw = dict(s=3.0, progress=False, n_draws=1000)
    e1 = fit_stage(MCMCSampler(rng=7, **kw), prob)
    e2 = fit_stage(MCMCSampler(rng=7, **kw), prob)
    e3 = fit_stage(MCMCSampler(rng=8, **kw), prob)
    np.testing.assert_array_equal(e1.draws, e2.draws)
    assert e1.info["convergence"] == e2.info["convergence"]
    assert not np.array_equal(e1.draws, e3.draws)
    # Reported R-hat (nested, superchain = ensemble), bulk/tail ESS and MCSE equal arviz's own
    # functions on the returned chains (same numbers, 1e-12).
    dt = e1.extras["posterior"]
    run = e1.info["sampling"]
    ids = np.repeat(np.arange(run["n_ensembles"]), run["nwalkers"])
    conv = e1.info["convergence"]
    for v in ("tau", "noise_sd"):
        r = float(az.rhat_nested(dt, var_names=[v], superchain_ids=list(ids))[v].values)
        assert conv["rhat"][v] == pytest.approx(r, rel=1e-12)
        for kind in ("bulk", "tail"):
            e = float(az.ess(dt, var_names=[v], method=kind)[v].values)
            assert conv[f"ess_{kind}"][v] == pytest.approx(e, rel=1e-12)
        m = float(az.mcse(dt, var_names=[v])[v].values)
        assert conv["mcse_mean"][v] == pytest.approx(m, rel=1e-12)
    # The same R-hat straight from a (chain, draw) array: the chains are the walkers.
    tau = dt["posterior"]["tau"].values
    r = az.rhat_nested(tau, superchain_ids=list(ids), chain_axis=0, draw_axis=1)
    assert conv["rhat"]["tau"] == pytest.approx(float(r), rel=1e-12)


def test_datatree_groups_loo_and_sensor_table(rng):
    prob, _, _ = _scenario(rng, known=True)
    est = fit_stage(MCMCSampler(s=3.0, rng=2, progress=False, n_draws=1000), prob)
    dt = est.extras["posterior"]
    for g in ("posterior", "log_likelihood", "posterior_predictive", "observed_data"):
        assert g in dt.children
    ll = dt["log_likelihood"]["y"]
    assert ll.dims == ("chain", "draw", "sensor")
    assert list(ll["sensor"].values) == list(prob.sensor)
    np.testing.assert_array_equal(dt["observed_data"]["y"].values, prob.y)
    # PSIS-LOO per sensor: the table's Pareto k equal arviz's loo on the same tree.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loo = az.loo(dt, pointwise=True)
    table = est.extras["sensor_table"]
    np.testing.assert_allclose(table["pareto_k"], loo.pareto_k.values, rtol=1e-12)
    assert est.info["loo"]["elpd_loo"] == pytest.approx(float(loo.elpd), rel=1e-12)
    assert {"sensor", "x", "y", "value", "pareto_k"} <= set(table.columns)
    assert est.draws.shape[1] == prob.n_coef and est.draws.shape[0] == est.info["n_draws"]


def test_step_cap_and_bad_settings_warn_or_raise(rng):
    prob, _, _ = _scenario(rng)
    with pytest.warns(MCMCWarning, match="step cap"):
        est = fit_stage(MCMCSampler(s=3.0, rng=0, progress=False, max_steps=20, min_steps=20,
                          n_draws=200), prob)
    assert any("step cap" in w for w in est.warnings)
    with pytest.raises(ValueError, match="'n_ensembles' parameter of MCMCSampler"):
        MCMCSampler(n_ensembles=2).fit(prob)
    with pytest.raises(ValueError, match="collapsed=False"):
        MCMCSampler(collapsed=False, faulty=True).fit(prob)
    with pytest.raises(ValueError, match="'fault_rate' parameter"):
        MCMCSampler(faulty=True, fault_rate=1.5).fit(prob)


# --- faulty sensors, angle error, calibration -------------------------------------------------
@pytest.mark.slow
def test_faulty_sensor_is_found_and_ignored():
    # Seeded simulations: one working rim sensor offset by +8 to +20 units. In >= 90 % of
    # trials the offset sensor must get fault probability > 0.9 and every other sensor < 0.2,
    # and the RMS query error must stay within 1.2x that of a fit without the bad sensor
    # (the closed-form posterior at the same s). Hogg, Bovy & Lang (2010) mixture model.
    rng = np.random.default_rng(7)
    ok, err_f, err_ref = [], [], []
    for _ in range(20):
        prob, test, truth = _scenario(rng, n_modes=22, n_rim=24, n_probe=3, sigma=0.1)
        bad = int(rng.integers(0, 24))
        y = prob.y.copy()
        y[bad] += rng.uniform(8, 20)
        dirty = LinearProblem(prob.G, y, prob.sigma, prob.degrees, prob.eigenvalues,
                              prob.domain, prob.sensor, prob.points)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            est = fit_stage(MCMCSampler(faulty=True, s=2.0, rng=int(rng.integers(1 << 30)),
                              progress=False, n_draws=1000, min_steps=300), dirty)
            ref = fit_stage(GaussianPosterior(s=2.0),
                            dirty.subset(np.arange(prob.n_readings) != bad))
        pf = est.extras["sensor_table"]["fault_probability"].to_numpy()
        others = np.delete(pf, bad)
        ok.append(pf[bad] > 0.9 and others.max() < 0.2)
        assert any(prob.sensor[bad] in w for w in est.warnings)
        err_f.append(est.at(test).mean - truth)
        err_ref.append(ref.at(test).mean - truth)
    assert np.mean(ok) >= 0.9, np.mean(ok)
    rms = lambda e: np.sqrt(np.mean(np.square(e)))  # noqa: E731
    assert rms(err_f) <= 1.2 * rms(err_ref), (rms(err_f), rms(err_ref))


@pytest.mark.slow
def test_angle_model_recovers_offsets():
    # Rim sensors sit 3 degrees (sd) away from their nominal angles on a field with a strong
    # angular gradient; the angle model's posterior mean offsets must track the true offsets
    # (correlation > 0.6), and its 90 % intervals for the field must cover the truth at least
    # as often as the model that ignores the offsets.
    rng = np.random.default_rng(11)
    d = Disk(1.0, (0.0, 0.0), 8)
    c = np.zeros(d.n_coef)
    c[0], c[3], c[6] = 20.0, 3.0, -2.0  # a0, a2, b3: gradients of several units per radian
    th = np.linspace(0, 2 * np.pi, 20, endpoint=False)
    off = np.deg2rad(3.0) * rng.standard_normal(20)
    pts_nom = d.from_polar(1.0, th)
    y = d.design(d.from_polar(1.0, th + off)) @ c + 0.02 * rng.standard_normal(20)
    prob = LinearProblem(d.design(pts_nom), y, np.full(20, 0.02), d.degrees, d.eigenvalues, d,
                         points=pts_nom)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = fit_stage(MCMCSampler(angle_sd_deg=3.0, s=4.0, rng=5, progress=False, n_draws=600,
                          min_steps=250, max_steps=1500), prob)
        plain = fit_stage(MCMCSampler(s=4.0, rng=5, progress=False, n_draws=600), prob)
    got = est.extras["sensor_table"]["angle_offset_deg_mean"].to_numpy()
    assert np.corrcoef(got, np.rad2deg(off))[0, 1] > 0.6
    test = d.from_polar(rng.uniform(0.3, 1.0, 40), rng.uniform(0, 2 * np.pi, 40))
    truth = d.design(test) @ c

    def cover(e):
        s = e.at(test)
        return np.mean((s.lower <= truth) & (truth <= s.upper))

    assert cover(est) >= cover(plain)


@pytest.mark.slow
def test_mcmc_calibration_truth_from_prior():
    # 15 seeded problems x 10 test points, truth drawn from the prior (s = 2.5, tau = 1); s and
    # tau sampled (s in [2, 4], inside which the true s lies, keeps the truncation at 22
    # harmonics and the run short).
    # Coverage of 90 % intervals in 85-95 %: binomial sd for 150 points is 2.4 %, so the band
    # is about +-2 sd; a fixed seed makes the test deterministic.
    rng = np.random.default_rng(99)
    hits = []
    for _ in range(15):
        prob, test, truth = _scenario(rng, n_modes=22, n_rim=int(rng.integers(14, 28)),
                                      gap=0.2, sigma=float(rng.choice([0.02, 0.05, 0.1])),
                                      n_test=10, s_true=2.5)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            est = fit_stage(MCMCSampler(s_bounds=(2.0, 4.0), rng=int(rng.integers(1 << 30)),
                              progress=False, n_draws=1000), prob)
        s = est.at(test, 0.9)
        hits.append((s.lower <= truth) & (truth <= s.upper))
    cover = np.mean(hits)
    assert 0.85 <= cover <= 0.95, cover


# --- command line ----------------------------------------------------------------------------
def _demo_csv():
    from importlib import resources

    return resources.files("invert") / "data" / "demo_readings.csv"


def test_cli_rejects_mcmc_options_for_gaussian(tmp_path):
    with _as_file() as path:
        r = subprocess.run([sys.executable, "-m", "invert.cli", "fit", str(path), "--radius",
                            "0.25", "--out", str(tmp_path / "o"), "--method", "gaussian",
                            "--faulty"], capture_output=True, text=True)
    assert r.returncode == 2
    assert "--faulty" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "o").exists()


def _as_file():
    from importlib import resources

    return resources.as_file(_demo_csv())


@pytest.mark.slow
def test_cli_fit_mcmc_faulty_writes_outputs(tmp_path):
    pytest.importorskip("h5py", reason="posterior.nc is written with h5netcdf, which needs h5py")
    import json

    import pandas as pd

    out = tmp_path / "fit"
    with _as_file() as path:
        r = subprocess.run([sys.executable, "-m", "invert.cli", "fit", str(path), "--radius",
                            "0.25", "--out", str(out), "--method", "mcmc", "--faulty",
                            "--fix-smoothness", "--smoothness", "2.5", "--max-steps", "2000"],
                           capture_output=True, text=True)
    assert r.returncode == 0, r.stderr
    summary = json.loads((out / "summary.json").read_text())
    assert summary["method"] == "mcmc" and "convergence" in summary
    table = pd.read_csv(out / "sensors.csv")
    assert "fault_probability" in table.columns
    dt = az.from_netcdf(out / "posterior.nc")
    assert "log_likelihood" in dt.children
    b = pd.read_csv(out / "boundary.csv")
    assert len(b) >= 360 and list(b.columns) == ["theta_deg", "mean", "sd", "lower", "upper"]
