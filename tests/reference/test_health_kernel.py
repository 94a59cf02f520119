"""The sensor-health model on the compiled kernel (invert.stages.assimilate.health).

Oracles outside the kernel's algebra:
- the joint Gaussian posterior of the stacked model with offset states (Rauch, Tung &
  Striebel 1965: the smoother's marginals are those of the joint posterior; bias states as in
  Simon, Optimal State Estimation, 2006, sec. 7.1), built here in information form: the prior
  precision of the Gauss-Markov chain is block tridiagonal (Rue & Held 2005, sec. 1.2), plus
  H' R^-1 H per frame with the augmented rows [h_i, B_i], solved by scipy.linalg.cho_factor;
- scipy.stats.multivariate_normal.logpdf of the stacked observed values (Harvey 1989) for the
  likelihood;
- scipy.stats.norm.pdf for the good/faulty weights of one reading;
- with faults screened, the same dense posterior with each reading's variance r_i / w_i (the
  weighted-likelihood update of Ting, Theodorou & Schaal 2007 is a Gaussian update with those
  variances, so the smoother must equal the joint posterior of that Gaussian model).
"""

import numpy as np
import pytest
from scenarios import joint_posterior, stacked_values
from scipy import stats

from invert.geometry.disk import Disk
from invert.prior import SmoothnessPrior
from invert.stages.assimilate import health, kernel
from invert.stages.assimilate.dynamics import CoefficientDynamics


def _model(time_scale=5.0, n_modes=3):
    """6 rim sensors and 2 probes on the unit disk, s = 2, noise sd 0.1, mean level var 100."""
    d = Disk(1.0, (0.0, 0.0), n_modes)
    th = np.linspace(0, 2 * np.pi, 6, endpoint=False)
    pts = np.vstack([np.c_[np.cos(th), np.sin(th)], [[0.3, 0.1], [-0.2, -0.4]]])
    shape = SmoothnessPrior(s=2.0).shape(d.eigenvalues, d.degrees)
    model = CoefficientDynamics.from_prior(d.design(pts), np.full(len(pts), 0.1**2), shape,
                                           d.degrees, tau2=1.0, time_scale=time_scale,
                                           mean_var=100.0)
    return d, model


def _as_dynamics(km):
    """The augmented kernel model as a CoefficientDynamics (for its transition diagonals)."""
    return CoefficientDynamics(km.H, km.noise_var, km.prior_var, km.drift_var, km.random_walk,
                               km.time_scale)


def _log(model, n=30, rng=0, offsets=True):
    """Jittered steps with a gap, drop-outs, an empty frame; a step offset on sensor 2."""
    rng = np.random.default_rng(rng)
    t = np.cumsum(1.0 + rng.uniform(-0.03, 0.03, n))
    t[n // 2:] += 12.0
    p = model.n_coef
    c = np.empty((n, p))
    c[0] = np.sqrt(np.minimum(model.prior_var, 1.0)) * rng.standard_normal(p)
    c[0, model.random_walk] += 20.0
    for k in range(1, n):
        f, q = model.transition(t[k] - t[k - 1])
        c[k] = f * c[k - 1] + np.sqrt(q) * rng.standard_normal(p)
    Y = c @ model.H.T + np.sqrt(model.noise_var) * rng.standard_normal((n, len(model.H)))
    if offsets:
        Y[n // 3:, 2] += 0.5
    Y[rng.random(Y.shape) < 0.05] = np.nan
    Y[7] = np.nan
    return t, Y


def _moments(cov, rows, n, p):
    """Per frame: sds of ``rows @ x_k`` from the stacked covariance."""
    return np.sqrt(np.array([np.diag(rows @ cov[k * p:(k + 1) * p, k * p:(k + 1) * p] @ rows.T)
                             for k in range(n)]))


def test_contrast_basis_is_orthonormal_with_zero_sums():
    # B'B = I and B'1 = 0 (definition), checked with numpy; 1e-14: orthogonal-factor rounding
    B = health.contrast_basis(7)
    np.testing.assert_allclose(B.T @ B, np.eye(6), atol=1e-14)
    np.testing.assert_allclose(B.T @ np.ones(7), 0, atol=1e-14)
    np.testing.assert_allclose(B @ B.T, np.eye(7) - 1 / 7, atol=1e-14)


@pytest.mark.parametrize("trusted", [None, np.array([1, 0, 0, 1, 0, 0, 1, 0], bool)])
@pytest.mark.parametrize("seed", [0, 1])
def test_augmented_smoother_equalsjoint_posterior(trusted, seed):
    # Joint Gaussian posterior of the stacked model with offsets (module docstring). Faults
    # off (fault_prior 0): the plain Gaussian update. Tolerance 1e-10 in sd units for means,
    # 1e-10 relative for sds: exact algebra, stacked precision conditioned ~1e4-1e6 (prior
    # variance 100 and offset variance 1 against noise variance 0.01), times eps ~ 1e-11.
    d, model = _model()
    km = health.augment(model, health.HealthSettings(offset_sd=1.0, offset_rate=0.3,
                                                     fault_prior=0.0), trusted)
    dyn = _as_dynamics(km)
    t, Y = _log(model, rng=seed)
    n, p = len(t), km.n_coef
    mean, cov = joint_posterior(dyn, t, Y, np.broadcast_to(km.noise_var, Y.shape))
    field = np.hstack([d.design(np.array([[0.0, 0.0], [0.5, 0.2]])),
                       np.zeros((2, p - model.n_coef))])
    rows = np.vstack([field, health.offset_rows(model.n_coef, len(model.H), trusted)])
    out = kernel.smooth_model(km, t, Y, rows, segment=7)
    sd = np.sqrt(np.diag(cov).reshape(n, p))
    np.testing.assert_allclose((out.mean - mean) / sd, 0, atol=1e-10)
    qsd = _moments(cov, rows, n, p)
    np.testing.assert_allclose(out.query_sd[qsd > 0], qsd[qsd > 0], rtol=1e-10)
    np.testing.assert_allclose(out.query_sd[qsd == 0], 0, atol=1e-12)  # trusted: no offset
    np.testing.assert_allclose(out.query_mean, mean @ rows.T, rtol=0,
                               atol=1e-10 * np.abs(mean @ rows.T).max())
    np.testing.assert_allclose(out.level_sd[:, 0], sd[:, 0], rtol=1e-10)
    # likelihood: the stacked observed values are Gaussian; logpdf by scipy (Harvey 1989),
    # 1e-10 relative (algebra)
    assert out.loglik == pytest.approx(_stacked_logpdf(dyn, t, Y), rel=1e-10)


def _stacked_logpdf(dyn, t, Y):
    C, yo = stacked_values(dyn, t, Y)
    return stats.multivariate_normal(np.zeros(len(yo)), C).logpdf(yo)


def test_fault_weight_of_one_reading_matches_the_mixture():
    # One sensor, a state with known prediction: the fault probability is the posterior weight
    # of the wide component of (1-eps) N(nu; 0, s) + eps N(nu; 0, s + b) (scipy.stats.norm);
    # 1e-12 relative: closed form in both.
    H = np.array([[1.0]])
    km = kernel.KernelModel.build(H, [0.04], [1.0], [1.0], [True], 1e6)
    km = kernel.KernelModel(km.H, km.noise_var, km.prior_var, km.drift_var, km.random_walk,
                            km.time_scale, 0.02, np.array([0.04 * 25.0**2]), None)
    t = np.array([0.0, 1.0])
    for jump in (0.1, 0.5, 1.0, 3.0):
        Y = np.array([[0.0], [jump]])
        carry, *_, fault = kernel.filter_chunk(km, kernel.FilterCarry.initial(km), t, Y,
                                               faults=True)
        # prediction after the first (information-form, unscreened) frame
        p1 = 1.0 / (1.0 + 1.0 / 0.04)
        s = p1 + 1.0 * 2.0 / 1e6 + 0.04
        good = 0.98 * stats.norm.pdf(jump, scale=np.sqrt(s))
        bad = 0.02 * stats.norm.pdf(jump, scale=np.sqrt(s + 0.04 * 625.0))
        assert fault[0, 0] == 0.0  # the first frame has no prediction to judge it by
        assert fault[1, 0] == pytest.approx(bad / (good + bad), rel=1e-12)


def test_screened_smoother_equals_joint_posterior_with_effective_variances():
    # Faults screened (fault_prior 0.05, wide component 30 noise sds): the decisions depend on
    # the prediction only, so the filter and the smoother's recomputed passes are one Gaussian
    # model whose reading variances are r_i / w_i (w = 1 - fault probability, floored at 1e-10
    # as in the kernel). Its joint posterior (module docstring) must equal the smoother's
    # output. Tolerance 1e-9 in sd units: the algebra as above, and w taken as 1 - p (absolute
    # rounding 1e-16 in w, relative 1e-6 where w ~ 1e-10 -- such a reading's weight is then
    # 1e-10 of a good one's, a change of <1e-15 sd in the posterior).
    d, model = _model()
    km = health.augment(model, health.HealthSettings(offset_sd=1.0, offset_rate=0.3,
                                                     fault_prior=0.05, fault_scale=30.0))
    dyn = _as_dynamics(km)
    t, Y = _log(model, rng=3)
    Y[12, 4] += 5.0   # a gross spike (50 noise sds)
    Y[20, 1] += 0.35  # a doubtful one (3.5 noise sds)
    n, p = len(t), km.n_coef
    *_, fault = kernel.filter_chunk(km, kernel.FilterCarry.initial(km), t, Y, faults=True)
    assert fault[12, 4] > 0.999 and fault[20, 1] > 0.01
    w = np.maximum(1.0 - fault, 1e-10)
    mean, cov = joint_posterior(dyn, t, Y, km.noise_var / w)
    rows = np.hstack([d.design(np.array([[0.0, 0.0]])), np.zeros((1, p - model.n_coef))])
    out = kernel.smooth_model(km, t, Y, rows, segment=5)
    sd = np.sqrt(np.diag(cov).reshape(n, p))
    np.testing.assert_allclose((out.mean - mean) / sd, 0, atol=1e-9)
    np.testing.assert_allclose(out.query_sd, _moments(cov, rows, n, p), rtol=1e-9)


def test_fault_prior_zero_is_the_plain_kernel():
    # The default path: a model without fault prior gives bit-identical results to the model
    # built before the fault fields existed (same operations; exact equality).
    d, model = _model()
    t, Y = _log(model, rng=4, offsets=False)
    km = kernel.KernelModel.from_dynamics(model)
    km0 = kernel.KernelModel(km.H, km.noise_var, km.prior_var, km.drift_var, km.random_walk,
                             km.time_scale, 0.0, np.ones(len(km.H)), None)
    Hq = d.design(np.array([[0.0, 0.0]]))
    a, b = kernel.smooth_model(km, t, Y, Hq), kernel.smooth_model(km0, t, Y, Hq)
    np.testing.assert_array_equal(a.mean, b.mean)
    np.testing.assert_array_equal(a.query_sd, b.query_sd)
    assert a.loglik == b.loglik


def test_every_sensor_trusted_is_refused():
    _, model = _model()
    with pytest.raises(ValueError, match="every sensor of the layout is marked trusted"):
        health.augment(model, trusted=np.ones(len(model.H), bool))
