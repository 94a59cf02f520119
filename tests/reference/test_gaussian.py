"""Tests of the Gaussian stage (closed-form posterior, type-II maximum likelihood).

Oracles: scikit-learn's BayesianRidge (evidence maximisation, Bishop 2006 §3.5; MacKay
1992), the gain form of the Gaussian posterior (Bishop 2006 eqs. 3.53-3.54; Rasmussen &
Williams 2006 eq. 2.25),
scipy.stats.multivariate_normal for the evidence, and seeded calibration with truth drawn from
the prior.
"""

import warnings

import numpy as np
import pytest
from scipy import stats
from sklearn.linear_model import BayesianRidge

from invert import Disk, GaussianPosterior, LinearProblem, SmoothnessPrior
from invert.stages.mcmc.collapsed import CollapsedModel
from invert.workflow import fit_stage


def _scenario(rng, *, n_modes=22, n_rim=24, n_probe=3, sigma=0.05, known=True, gap=0.2,
              s_true=2.0, tau_true=1.0):
    """Truth drawn from the prior (s_true, tau_true, mean level 20 +- 1), a rim ring with a
    contiguous gap plus interior probes; mirrors bench/calibrate_rules.py."""
    d = Disk(1.0, (0.0, 0.0), n_modes)
    v = SmoothnessPrior(s=s_true, tau=tau_true).variances(d.eigenvalues, d.degrees)
    v[0] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    c[0] += 20.0
    th = np.linspace(0, 2 * np.pi, n_rim, endpoint=False)
    g0 = rng.uniform(0, 2 * np.pi)
    keep = np.mod(th - g0, 2 * np.pi) >= 2 * np.pi * gap
    pts = np.vstack([np.c_[np.cos(th), np.sin(th)][keep],
                     d.from_polar(rng.uniform(0.2, 0.7, n_probe),
                                  rng.uniform(0, 2 * np.pi, n_probe))])
    G = d.design(pts)
    y = G @ c + sigma * rng.standard_normal(len(pts))
    prob = LinearProblem(G, y, np.full(len(pts), sigma) if known else None, d.degrees,
                         d.eigenvalues, d, points=pts)
    test = np.vstack([d.from_polar(rng.uniform(0, 0.9, 6), rng.uniform(0, 2 * np.pi, 6)),
                      d.from_polar(1.0, g0 + 2 * np.pi * gap * rng.random(4))])
    return prob, test, d.design(test) @ c


@pytest.fixture
def rng():
    return np.random.default_rng(42)


def test_hyperparameters_match_sklearn_bayesian_ridge(rng):
    # Bishop 2006 §3.5 / MacKay 1992: BayesianRidge maximises the same evidence on the standard-form
    # problem
    # Phi = G D(s), t = y; its lambda_ is our 1/tau^2 and alpha_ our 1/noise^2. With the gamma
    # hyperpriors set to 0 both find the same stationary point; rtol 1e-6 covers sklearn's
    # fixed-point stopping rule (tol=1e-10 on the coefficients).
    prob, _, _ = _scenario(rng, known=False, n_modes=22)
    g = GaussianPosterior(s=2.0)
    est = fit_stage(g, prob)
    D = np.sqrt(SmoothnessPrior(s=2.0).shape(g.problem_.eigenvalues, g.problem_.degrees))
    br = BayesianRidge(fit_intercept=False, tol=1e-10, max_iter=5000, alpha_1=0, alpha_2=0,
                       lambda_1=0, lambda_2=0, compute_score=True).fit(g.problem_.G * D, prob.y)
    assert g.tau_ == pytest.approx(1 / np.sqrt(br.lambda_), rel=1e-6)
    assert g.noise_sd_ == pytest.approx(1 / np.sqrt(br.alpha_), rel=1e-6)
    # sklearn's score is the log evidence at its last iterate (same formula, Bishop eq. 3.86).
    assert g.log_evidence_ == pytest.approx(br.scores_[-1], abs=1e-5)
    assert est.info["tau"] == g.tau_ and est.info["log_evidence"] == g.log_evidence_
    # Posterior mean = sklearn's coef_ mapped back, c = D x (algebra; sklearn's tolerance).
    np.testing.assert_allclose(est.mean[1:], (D * br.coef_)[1:], rtol=1e-4, atol=1e-6)


def test_posterior_equals_gain_form_and_evidence_equals_scipy(rng):
    # Bishop (2006) eqs. 3.53-3.54 in information form, Sigma = (P^-1 + G^T S^-1 G)^-1 and
    # mean = Sigma G^T S^-1 y, formed densely (the gain form is ill-conditioned with the broad
    # mean-level variance 1e8 tau^2), and the evidence vs scipy.stats.multivariate_normal (a
    # small broad-mean scale keeps the dense covariance well conditioned for scipy).
    # Tolerances: algebra, 1e-8.
    prob, _, _ = _scenario(rng, n_modes=8, known=True)
    g = GaussianPosterior(s=3.0, tau=0.8)
    est = fit_stage(g, prob)
    P = np.diag(SmoothnessPrior(s=3.0, tau=0.8).variances(prob.eigenvalues, prob.degrees))
    S = np.diag(prob.sigma**2)
    Sig = np.linalg.inv(np.linalg.inv(P) + prob.G.T @ np.linalg.inv(S) @ prob.G)
    np.testing.assert_allclose(est.mean, Sig @ prob.G.T @ np.linalg.inv(S) @ prob.y,
                               rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(est.cov, Sig, rtol=1e-8, atol=1e-12)
    # Evidence: the same value from the Cholesky/Woodbury path; and both against scipy with a
    # broad-mean scale of 3 (well conditioned).
    cm = CollapsedModel(prob)
    assert g.log_evidence_ == pytest.approx(cm.loglik([0.8], [3.0], [[1.0]])[0], abs=1e-7)
    cm3 = CollapsedModel(prob, mean_scale=3.0)
    P3 = np.diag(SmoothnessPrior(s=3.0, tau=0.8, mean_scale=3.0).variances(prob.eigenvalues,
                                                                          prob.degrees))
    ref = stats.multivariate_normal(np.zeros(prob.n_readings),
                                    prob.G @ P3 @ prob.G.T + S).logpdf(prob.y)
    assert cm3.loglik([0.8], [3.0], [[1.0]])[0] == pytest.approx(ref, rel=1e-10)


def test_evidence_is_maximal_at_the_chosen_hyperparameters(rng):
    # Type-II ML: moving tau, noise or s away from the optimum lowers the evidence (computed
    # independently by CollapsedModel's Cholesky path).
    prob, _, _ = _scenario(rng, known=False, n_modes=22)
    g = GaussianPosterior(s_bounds=(1.8, 5.0))
    fit_stage(g, prob)
    cm = CollapsedModel(g.problem_)
    best = cm.loglik([g.tau_], [g.s_], [[g.noise_sd_**2]])[0]
    assert best == pytest.approx(g.log_evidence_, abs=1e-6)
    for dt, ds, dn in [(1.05, 0, 1), (0.95, 0, 1), (1, 0, 1.05), (1, 0, 0.95), (1, 0.05, 1),
                       (1, -0.05, 1)]:
        s = g.s_ + ds
        if not 1.8 <= s <= 5.0:
            continue
        assert cm.loglik([g.tau_ * dt], [s], [[(g.noise_sd_ * dn) ** 2]])[0] < best


def test_known_sigma_with_noise_scale(rng):
    # A common factor on given sigmas is estimated: readings simulated with 3x the stated
    # sigma give a factor near 3 (sampling error of a variance from ~25 readings: +-30 %).
    prob, _, _ = _scenario(rng, sigma=0.15, known=True, n_modes=22)
    prob = LinearProblem(prob.G, prob.y, prob.sigma / 3, prob.degrees, prob.eigenvalues,
                         prob.domain, points=prob.points)
    g = GaussianPosterior(s=2.0, fit_noise_scale=True)
    est = fit_stage(g, prob)
    assert 2.0 < g.noise_sd_ < 4.0
    assert est.info["noise_scale"] == g.noise_sd_ and est.df is not None


def test_truncation_is_raised_for_the_roughest_smoothness(rng):
    prob, _, _ = _scenario(rng, n_modes=10)
    est = fit_stage(GaussianPosterior(), prob)
    # invert.prior.truncation_degree(disk, 1.5) = 99 harmonics.
    assert est.domain.n_modes == 99 and est.info["notes"]
    # A hand-made design cannot be rebuilt: the lower end of s is raised instead, with a warning.
    hand = LinearProblem(prob.G, prob.y, prob.sigma, prob.degrees, prob.eigenvalues,
                         prob.domain)
    with pytest.warns(UserWarning, match="truncation degree supports"):
        est2 = GaussianPosterior().fit(hand)
    assert est2.domain.n_modes == 10
    assert any("truncation" in w for w in est2.warnings)


def test_bad_settings_raise(rng):
    prob, _, _ = _scenario(rng, n_modes=8)
    with pytest.raises(ValueError, match="'s_bounds' parameter of GaussianPosterior"):
        GaussianPosterior(s_bounds=(0.2, 3)).fit(prob)
    with pytest.raises(ValueError, match="'tau' parameter of GaussianPosterior"):
        GaussianPosterior(tau=-1).fit(prob)
    with pytest.raises(ValueError, match="noise_sd"):
        GaussianPosterior(noise_sd=0.1).fit(prob)


@pytest.mark.slow
@pytest.mark.parametrize("known", [True, False])
def test_calibration_truth_from_prior(known):
    # 150 seeded problems x 10 test points (interior and inside the rim gap). Coverage of the
    # nominal 90 % intervals must lie in 85-95 %: the binomial sd for 1500 points is 0.8 %,
    # and points of one problem are correlated, so the band is about 3-4 effective sd.
    rng = np.random.default_rng(2024 + known)
    hits = []
    for _ in range(150):
        prob, test, truth = _scenario(rng, known=known, n_rim=int(rng.integers(16, 33)),
                                      sigma=float(rng.choice([0.02, 0.05, 0.1])))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            est = fit_stage(GaussianPosterior(s_bounds=(1.5, 4.0)), prob)
        s = est.at(test, 0.9)
        hits.append((s.lower <= truth) & (truth <= s.upper))
    cover = np.mean(hits)
    assert 0.85 <= cover <= 0.95, cover
