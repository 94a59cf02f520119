"""The hyperparameter-averaged stage (invert/stages/averaged.py) and the suspect mixture
(invert/stages/suspects.py), checked against direct dense computations with scipy/numpy."""

import warnings

import numpy as np
import pytest
from scenarios import noisy_problem, prior_coefficients, ring_angles
from scipy import stats

from invert.prior import SmoothnessPrior
from invert.stages.averaged import MIN_WEIGHT, AveragedPosterior
from invert.stages.suspects import gaussian_mixture
from invert.workflow import make_domain, robust_stage, run_stage


@pytest.fixture
def small():
    rng = np.random.default_rng(5)
    d = make_domain(1.0, n_modes=6)
    pts = np.vstack([d.from_polar(1.0, ring_angles(14)[2:]), d.from_polar(0.5, ring_angles(3))])
    c = prior_coefficients(rng, d)
    return d, noisy_problem(rng, d, pts, c, 0.05)


def dense_components(stage, p):
    """Weights, means and covariances of every grid component by dense Gaussian algebra.

    Model (Bishop 2006, eqs. 3.53-3.54 and 3.86, with numpy dense algebra):
    c ~ N(0, tau^2 diag(shape)) with the prior's broad mean level ((1e4 tau)^2,
    invert.prior.MEAN_SCALE); y ~ N(G c, diag(sigma^2)).
    """
    mode, _, noise = stage._mode(p)
    rows = stage._components(p, mode, noise)
    G, R = p.G, np.diag(p.sigma**2)
    logev, means, covs = [], [], []
    for s, _spec, alphas, *_ in rows:
        shape = SmoothnessPrior(s=s).shape(p.eigenvalues, p.degrees)
        for a in alphas:
            v = shape / a  # tau^2 = nu^2 / alpha with nu = 1 (given sigma); mean level broad
            info = np.diag(1 / v) + G.T @ np.linalg.solve(R, G)
            S = np.linalg.inv(info)
            b = G.T @ np.linalg.solve(R, p.y)
            # Bishop (2006) eq. 3.86 in information form: the covariance G V G^T + R spans 1e13
            # (broad mean level), too wide for a direct determinant; this form is not.
            logev.append(-0.5 * (p.y @ np.linalg.solve(R, p.y) - b @ S @ b
                                 + np.linalg.slogdet(R)[1] + np.sum(np.log(v))
                                 + np.linalg.slogdet(info)[1] + len(p.y) * np.log(2 * np.pi)))
            covs.append(S)
            means.append(S @ b)
    w = np.exp(np.array(logev) - max(logev))
    w = np.where(w / w.max() >= MIN_WEIGHT, w, 0.0)
    return w / w.sum(), np.array(means), np.array(covs)


def test_averaged_posterior_equals_the_dense_evidence_weighted_mixture(small):
    # Bayesian model averaging (Hoeting et al. 1999): mixture moments of the dense posteriors
    # weighted by scipy's multivariate normal marginal likelihood. 1e-6 relative: the dense
    # inverses and determinants lose up to ~1e-8 at the condition numbers (~1e10) that the
    # broad mean level gives.
    d, pb = small
    stage = AveragedPosterior()
    est = stage.fit(pb)  # at the problem's own 6 harmonics (dense algebra stays accurate)
    w, M, C = dense_components(stage, pb)
    mean, cov = gaussian_mixture(w, [type("E", (), {"mean": m, "cov": c})() for m, c in
                                     zip(M, C)])
    np.testing.assert_allclose(est.mean, mean, rtol=1e-6, atol=1e-6 * np.abs(mean).max())
    np.testing.assert_allclose(est.cov, cov, rtol=1e-5, atol=1e-6 * np.abs(cov).max())
    assert est.info["n_components"] == int(np.sum(w > 0))
    assert sum(est.info["s_weights"].values()) == pytest.approx(1.0)


def test_gaussian_mixture_moments_follow_the_law_of_total_variance():
    # Mixture mean and covariance against a Monte Carlo draw of 400k points of the mixture
    # (numpy); 3 binomial-style standard errors of the sample moments.
    rng = np.random.default_rng(0)
    means = [np.array([0.0, 1.0]), np.array([2.0, -1.0])]
    covs = [np.array([[1.0, 0.3], [0.3, 0.5]]), np.array([[0.2, 0.0], [0.0, 2.0]])]
    w = np.array([0.7, 0.3])
    parts = [type("E", (), {"mean": m, "cov": c})() for m, c in zip(means, covs)]
    mean, cov = gaussian_mixture(w, parts)
    n = 400_000
    k = rng.random(n) < w[1]
    x = np.where(k[:, None], rng.multivariate_normal(means[1], covs[1], n),
                 rng.multivariate_normal(means[0], covs[0], n))
    np.testing.assert_allclose(mean, x.mean(axis=0), atol=3 * np.sqrt(np.diag(cov) / n).max())
    np.testing.assert_allclose(cov, np.cov(x.T), atol=0.02)


def test_clean_ring_is_left_unchanged_by_the_suspect_mixture():
    # The robust treatment must reduce to the ordinary fit when nothing is suspect: with a
    # truth from the prior and readings 0.3 noise sd from it (no reading can look faulty,
    # fault probability << 0.01 at |z| < 1) the estimate is returned as it is.
    rng = np.random.default_rng(3)
    d = make_domain(1.0)
    pts = np.vstack([d.from_polar(1.0, ring_angles(24)), d.from_polar(0.5, ring_angles(4))])
    c = prior_coefficients(rng, d)
    pb = noisy_problem(rng, d, pts, c, 0.05)
    pb.y[:] = pb.G @ c + 0.3 * 0.05 * np.sign(rng.standard_normal(len(pb.y)))
    plain = run_stage(pb, "averaged")
    est, _ = robust_stage(pb, "averaged")
    assert "suspects" not in est.info and "robust" not in est.info
    np.testing.assert_array_equal(est.mean, plain.mean)
    np.testing.assert_array_equal(est.cov, plain.cov)


def test_a_faulty_sensor_is_named_and_its_probability_matches_the_direct_mixture():
    # One rim reading 20 noise sd high. Its fault probability is the two-component mixture of
    # Hogg, Bovy & Lang (2010, eq. 17) evaluated here directly with scipy.stats.norm on the
    # refit without it; the estimate is the mixture of the two fits with those weights.
    rng = np.random.default_rng(8)
    d = make_domain(1.0)
    pts = np.vstack([d.from_polar(1.0, ring_angles(24)), d.from_polar(0.5, ring_angles(4))])
    c = prior_coefficients(rng, d)
    pb = noisy_problem(rng, d, pts, c, 0.05)
    pb.y[5] += 20 * 0.05
    with warnings.catch_warnings(record=True) as got:
        warnings.simplefilter("always")
        est, _ = robust_stage(pb, "averaged")
    sus = est.info["suspects"]["probability"]
    assert max(sus, key=sus.get) == str(pb.sensor[5])
    keep = np.ones(pb.n_readings, bool)
    keep[5] = False
    rest = run_stage(pb.subset(keep), "averaged")
    g = rest.domain.design(pts[5:6])[0]
    mu, var = g @ rest.mean, g @ rest.cov @ g
    sd_bad = max(np.std(pb.y), 10 * 0.05)
    good = 0.95 * stats.norm.pdf(pb.y[5], mu, np.sqrt(var + 0.05**2))
    bad = 0.05 * stats.norm.pdf(pb.y[5], mu, np.sqrt(var + sd_bad**2))
    p5 = bad / (good + bad)
    assert sus[str(pb.sensor[5])] == pytest.approx(p5, rel=1e-6)
    assert p5 > 0.9
    assert any(str(pb.sensor[5]) in str(w.message) and "may be faulty" in str(w.message)
               for w in got)
    # the truth at the faulty sensor's position lies inside the 90 % interval
    s = est.at(pts[5:6])
    truth = d.design(pts[5:6])[0] @ c
    assert s.lower[0] <= truth <= s.upper[0]
