"""Compiled exact filter + smoother (invert.stages.assimilate.kernel).

Oracles, both outside the kernel's algebra:
- the joint Gaussian posterior of the stacked linear model (Rauch, Tung & Striebel 1965: the
  smoother's marginals are those of the joint posterior), built here in information form: the
  prior precision of the Gauss-Markov chain c_0 ~ N(0, D), c_k = F_k c_{k-1} + w_k is block
  tridiagonal (Rue & Held 2005, Gaussian Markov random fields, sec. 1.2), plus H' R^-1 H per
  frame, solved by a dense Cholesky (scipy.linalg.cho_factor); this form stays accurate under
  the broad mean-level prior of the batch runner (variance 1e8 tau^2);
- scipy.stats.multivariate_normal.logpdf of the stacked observed values for the
  prediction-error log-likelihood (Harvey 1989), with the covariance of the stacked values
  built by products of the transition diagonals;
- the NumPy exact recursion, run_smoother(model, t, Y, steady_tol=0.0, max_transient=0) of
  invert.stages.assimilate.smoother and .filter (first update from the diagonal prior in
  information form, then block Joseph-form updates; RTS with a linear solve).
"""

import numpy as np
import pytest
from scenarios import joint_posterior, stacked_values
from scipy import linalg, stats

from invert.geometry.disk import Disk
from invert.prior import SmoothnessPrior
from invert.stages.assimilate import kernel
from invert.stages.assimilate.dynamics import CoefficientDynamics
from invert.stages.assimilate.filter import exact_loglik, fit_time_scale, log_likelihood
from invert.stages.assimilate.smoother import run_smoother


def _model(mean_var=100.0, time_scale=5.0, n_modes=3):
    """6 rim sensors and 2 probes on the unit disk, smoothness prior s = 2, noise sd 0.1."""
    d = Disk(1.0, (0.0, 0.0), n_modes)
    th = np.linspace(0, 2 * np.pi, 6, endpoint=False)
    pts = np.vstack([np.c_[np.cos(th), np.sin(th)], [[0.3, 0.1], [-0.2, -0.4]]])
    shape = SmoothnessPrior(s=2.0).shape(d.eigenvalues, d.degrees)
    model = CoefficientDynamics.from_prior(d.design(pts), np.full(len(pts), 0.1**2), shape,
                                           d.degrees, tau2=1.0, time_scale=time_scale,
                                           mean_var=mean_var)
    return d, model


def _log(model, n=40, rng=0, leading_empty=False):
    """Jittered 1-unit steps, a long gap, random single-cell drop-outs, an all-missing frame,
    one sensor out for a stretch; readings drawn from the model around a level of 20."""
    rng = np.random.default_rng(rng)
    t = np.cumsum(1.0 + rng.uniform(-0.03, 0.03, n))
    t[n // 2:] += 25.0  # a gap of five time scales
    p = model.n_coef
    c = np.empty((n, p))
    c[0] = np.sqrt(np.minimum(model.prior_var, 1.0)) * rng.standard_normal(p)
    c[0, model.random_walk] += 20.0
    for k in range(1, n):
        f, q = model.transition(t[k] - t[k - 1])
        c[k] = f * c[k - 1] + np.sqrt(q) * rng.standard_normal(p)
    Y = c @ model.H.T + np.sqrt(model.noise_var) * rng.standard_normal((n, len(model.H)))
    Y[rng.random(Y.shape) < 0.05] = np.nan  # random single-cell drop-outs
    Y[7] = np.nan                          # one frame without any reading
    Y[25:33, 2] = np.nan                   # a sensor out for a stretch
    if leading_empty:
        Y[:2] = np.nan
    return t, Y


@pytest.fixture(params=[0, 1, 2])
def case(request):
    d, model = _model()
    t, Y = _log(model, rng=request.param)
    Hq = d.design(np.array([[0.0, 0.0], [0.5, 0.2], [-0.3, 0.6]]))
    return model, t, Y, Hq


def test_equals_numpy_exact_recursion(case):
    # The NumPy exact recursion (block Joseph update, RTS by a linear solve) against the kernel
    # (sequential scalar updates, modified Bryson-Frazier adjoint). Tolerance 1e-10 relative:
    # both are exact algebra; with prior variance 100 beside noise variance 0.01 the
    # conditioning is ~1e4, so rounding differences are ~1e4 * eps ~ 1e-12 (margin 100).
    model, t, Y, Hq = case
    ref = run_smoother(model, t, Y, steady_tol=0.0, max_transient=0)
    qm, qs = ref.at(Hq)
    sd = np.sqrt(np.array([np.diag(ref.cov(k)) for k in range(len(t))]))
    for segment in (None, 1, 3, 7, 100):
        out = kernel.smooth_model(model, t, Y, Hq, segment=segment)
        np.testing.assert_allclose(out.mean, ref.mean, rtol=0,
                                   atol=1e-10 * np.abs(ref.mean).max())
        np.testing.assert_allclose(out.query_mean, qm, rtol=0, atol=1e-10 * np.abs(qm).max())
        np.testing.assert_allclose(out.query_sd, qs, rtol=1e-10, atol=0)
        np.testing.assert_allclose(out.level_sd[:, 0], sd[:, 0], rtol=1e-10, atol=0)
        np.testing.assert_allclose(out.level_mean[:, 0], ref.mean[:, 0], rtol=1e-10, atol=0)
        # same likelihood (prediction-error decomposition in both); 1e-10 relative, algebra
        assert out.loglik == pytest.approx(ref.loglik, rel=1e-10)


@pytest.mark.parametrize("mean_var", [100.0, None])
def test_equals_joint_posterior(mean_var):
    # Rauch, Tung & Striebel (1965): smoothed moments = marginals of the joint posterior of
    # the stacked model (information form, module docstring). mean_var=None is the batch
    # runner's broad mean level (prior variance 1e8 tau^2), where the first frame's update
    # loses ~1e-5 relative in the block covariance form but not in the kernel's
    # information-form first update. Tolerance 1e-10 in sd units and relative sds: algebra,
    # conditioning of the stacked precision (data precision 1e2 per reading against prior
    # precision down to 1e-8) ~1e4 for the smoothed moments.
    d, model = _model(mean_var=mean_var)
    t, Y = _log(model, rng=5)
    mean, cov = joint_posterior(model, t, Y)
    p = model.n_coef
    var = np.diag(cov).reshape(len(t), p)
    Hq = d.design(np.array([[0.0, 0.0], [0.5, 0.2]]))
    qvar = np.array([np.diag(Hq @ cov[k * p:(k + 1) * p, k * p:(k + 1) * p] @ Hq.T)
                     for k in range(len(t))])
    out = kernel.smooth_model(model, t, Y, Hq, segment=6)
    np.testing.assert_allclose((out.mean - mean) / np.sqrt(var), 0, atol=1e-10)
    np.testing.assert_allclose(out.level_sd[:, 0], np.sqrt(var[:, 0]), rtol=1e-10)
    np.testing.assert_allclose(out.query_sd, np.sqrt(qvar), rtol=1e-10)
    np.testing.assert_allclose(out.query_mean, mean @ Hq.T, rtol=0,
                               atol=1e-10 * np.abs(mean @ Hq.T).max())


@pytest.mark.parametrize("seed", [1, 2])
def test_exact_recursion_under_broad_prior_equals_joint_posterior(seed):
    # Under the batch runner's broad mean level (prior variance 1e8 tau^2) the NumPy exact
    # recursion takes its first update in information form (as the kernel does), so both
    # match the joint posterior (information form, module docstring) and each other.
    # Tolerance 1e-10 in sd units for means and 1e-10 relative for sds, as in
    # test_equals_joint_posterior: exact algebra, the stacked precision's conditioning
    # (~1e4 for the smoothed moments) times eps ~ 2e-12; measured up to 1.4e-11 in means
    # over six seeds. (The block covariance form at the first frame was off by ~0.2 sd.)
    d, model = _model(mean_var=None)
    t, Y = _log(model, rng=seed)
    mean, cov = joint_posterior(model, t, Y)
    p = model.n_coef
    var = np.diag(cov).reshape(len(t), p)
    Hq = d.design(np.array([[0.0, 0.0], [0.5, 0.2]]))
    qsd = np.sqrt(np.array([np.diag(Hq @ cov[k * p:(k + 1) * p, k * p:(k + 1) * p] @ Hq.T)
                            for k in range(len(t))]))
    ref = run_smoother(model, t, Y, steady_tol=0.0, max_transient=0)
    sd = np.sqrt(np.array([np.diag(ref.cov(k)) for k in range(len(t))]))
    np.testing.assert_allclose((ref.mean - mean) / np.sqrt(var), 0, atol=1e-10)
    np.testing.assert_allclose(sd, np.sqrt(var), rtol=1e-10)
    np.testing.assert_allclose(ref.at(Hq)[1], qsd, rtol=1e-10)
    out = kernel.smooth_model(model, t, Y, Hq)
    np.testing.assert_allclose(out.query_sd, qsd, rtol=1e-10)
    np.testing.assert_allclose((out.mean - ref.mean) / sd, 0, atol=1e-10)
    np.testing.assert_allclose(out.query_sd, ref.at(Hq)[1], rtol=1e-10)
    # same likelihood (prediction-error decomposition in both); algebra, measured ~3e-14
    assert out.loglik == pytest.approx(ref.loglik, rel=1e-10)


def test_frames_before_the_first_reading():
    # A log that starts with two empty frames: the covariance stays diagonal until the first
    # reading, which is then taken in information form; checked against the joint posterior
    # and the NumPy exact recursion. Tolerance as in test_equals_numpy_exact_recursion.
    d, model = _model()
    t, Y = _log(model, rng=3, leading_empty=True)
    mean, cov = joint_posterior(model, t, Y)
    p = model.n_coef
    var = np.diag(cov).reshape(len(t), p)
    out = kernel.smooth_model(model, t, Y, segment=4)
    np.testing.assert_allclose((out.mean - mean) / np.sqrt(var), 0, atol=1e-10)
    np.testing.assert_allclose(out.level_sd[:, 0], np.sqrt(var[:, 0]), rtol=1e-10)
    ref = run_smoother(model, t, Y, steady_tol=0.0, max_transient=0)
    np.testing.assert_allclose(out.mean, ref.mean, rtol=0, atol=1e-10 * np.abs(ref.mean).max())
    assert out.n_used[0] == out.n_used[1] == 0
    assert out.frame_loglik[0] == out.chi2[0] == 0.0


def test_loglik_and_chi2_equal_stacked_density(case):
    # Prediction-error decomposition (Harvey 1989): the sum of log N(v_k | 0, S_k) equals the
    # joint log-density of all observed values (scipy.stats.multivariate_normal), and the
    # innovations whiten the stacked values, so sum_k v_k' S_k^-1 v_k = y' C^-1 y.
    # Tolerance 1e-9 relative: scipy's eigendecomposition of C (mean-level variance 100
    # shared by ~300 values against noise variance 0.01: condition ~1e6) rounds to ~1e-11,
    # measured up to 4e-11 over six seeds; the kernel agrees with the NumPy recursion to ~1e-12.
    model, t, Y, _ = case
    C, yo = stacked_values(model, t, Y)
    ref = stats.multivariate_normal(np.zeros(len(yo)), C).logpdf(yo)
    out = kernel.smooth_model(model, t, Y)
    assert out.loglik == pytest.approx(ref, rel=1e-9)
    assert kernel.filter_loglik(model, t, Y) == pytest.approx(ref, rel=1e-9)
    assert out.chi2.sum() == pytest.approx(yo @ linalg.solve(C, yo, assume_a="pos"), rel=1e-9)
    np.testing.assert_array_equal(out.n_used, np.isfinite(Y).sum(axis=1))
    np.testing.assert_allclose(out.frame_loglik.sum(), out.loglik, rtol=1e-14)


def test_chunks_give_the_whole_log_answer(case):
    # Filtering chunk by chunk (carrying the state) and smoothing chunk by chunk backwards
    # (carrying the adjoint) is the same sequence of floating-point operations as one call:
    # the answers agree to rounding (1e-13 relative, far below any use of them).
    model, t, Y, Hq = case
    km = kernel.KernelModel.from_dynamics(model)
    whole = kernel.smooth_model(km, t, Y, Hq)
    cuts = [0, 9, 10, 26, len(t)]
    carry, cps = kernel.FilterCarry.initial(km), []
    for a, b in zip(cuts[:-1], cuts[1:], strict=True):
        carry, cp, *_ = kernel.filter_chunk(km, carry, t[a:b], Y[a:b], every=4)
        cps.append(cp)
    assert carry.loglik == pytest.approx(whole.loglik, rel=1e-13)
    back, means, sds = kernel.BackwardCarry.final(km), [], []
    for i in range(len(cps) - 1, -1, -1):
        a, b = cuts[i], cuts[i + 1]
        back, m, _, qs, _, _ = kernel.smooth_chunk(km, cps[i], back, t[a:b], Y[a:b], Hq)
        means.insert(0, m)
        sds.insert(0, qs)
    np.testing.assert_allclose(np.vstack(means), whole.mean, rtol=1e-13,
                               atol=1e-13 * np.abs(whole.mean).max())
    np.testing.assert_allclose(np.vstack(sds), whole.query_sd, rtol=1e-13)


def test_inputs_are_not_changed(case):
    # no hidden state: carries are new objects, inputs keep their values
    model, t, Y, _ = case
    km = kernel.KernelModel.from_dynamics(model)
    c0 = kernel.FilterCarry.initial(km)
    m0, P0, Y0 = c0.m.copy(), c0.P.copy(), Y.copy()
    kernel.filter_chunk(km, c0, t, Y)
    np.testing.assert_array_equal(c0.m, m0)
    np.testing.assert_array_equal(c0.P, P0)
    np.testing.assert_array_equal(Y, Y0)


def test_messages():
    _, model = _model()
    km = kernel.KernelModel.from_dynamics(model)
    t = np.arange(3.0)
    with pytest.raises(ValueError, match="The 'Y' parameter must have shape"):
        kernel.smooth_model(km, t, np.zeros((3, 2)))
    with pytest.raises(ValueError, match="strictly increasing"):
        kernel.smooth_model(km, t[::-1], np.zeros((3, 8)))
    with pytest.raises(ValueError, match="The 'time_scale' parameter must be a float > 0"):
        kernel.smooth_exact(model.H, model.noise_var, model.prior_var, model.drift_var,
                            model.random_walk, 0.0, t, np.zeros((3, 8)))
    with pytest.raises(ValueError, match="The 'Hq' parameter must have"):
        kernel.smooth_model(km, t, np.zeros((3, 8)), np.zeros((1, 2)))


@pytest.mark.parametrize("mean_var", [100.0, None])
@pytest.mark.parametrize("seed", [0, 4])
def test_filter_loglik_equals_numpy_exact_likelihood(mean_var, seed):
    # The time-scale fit's likelihood: the kernel's filter_loglik (sequential scalar updates)
    # against the NumPy exact recursion (log_likelihood, steady_tol=0: first update in
    # information form, then block updates), on logs with random drop-outs, 3 % time jitter,
    # a gap and an empty frame, at time scales from 0.3 to 300 steps. Both are the
    # prediction-error decomposition (Harvey 1989), exact algebra; tolerance 1e-9 relative
    # (the sum of ~300 terms of mixed sign, conditioning ~1e4: measured below 3e-14).
    _, model = _model(mean_var=mean_var)
    t, Y = _log(model, rng=seed)
    for T in (0.3, 5.0, 300.0):
        mod = model.with_time_scale(T)
        ref = log_likelihood(mod, t, Y, steady_tol=0.0)
        assert kernel.filter_loglik(mod, t, Y) == pytest.approx(ref, rel=1e-9)
        assert exact_loglik(mod, t, Y) == kernel.filter_loglik(mod, t, Y)


def test_fit_time_scale_by_kernel_equals_numpy_fit():
    # Same likelihood (test above) so the same maximiser: grid_then_refine with xatol=1e-3
    # in log T follows the same path; tolerance 1e-6 relative in T (the Brent steps may
    # differ only through the ~1e-13 differences in the likelihood).
    _, model = _model(mean_var=None)
    t, Y = _log(model, n=60, rng=2)
    T_k, ll_k = fit_time_scale(model, t, Y)
    T_n, ll_n = fit_time_scale(model, t, Y, steady_tol=0.0, use_kernel=False)
    assert T_k == pytest.approx(T_n, rel=1e-6)
    assert ll_k == pytest.approx(ll_n, rel=1e-9)
