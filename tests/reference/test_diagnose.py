"""Diagnostics: depth of information, gap dependence and exceedance against closed forms.

Each check names its source. The designed case: all sensors on the rim, equally spaced, equal
noise, fewer harmonics than half the number of sensors, so G^T G = diag(M, M/2, ..., M/2) and the
posterior is diagonal with variance 1/(1/v_n + M/(2 sigma^2)) per coefficient (discrete
orthogonality of cos/sin on M equally spaced points; Bishop 2006, eq. 3.51 for the posterior).
"""

import numpy as np
import pytest
from scipy import integrate, stats

from invert import Disk, Estimate, LinearProblem, Readings, poisson_kernel
from invert.diagnostics.diagnose import (
    attenuation,
    exceedance_probability,
    gap_dependence,
    half_mass_width,
    max_exceedance,
    prior_variances,
    radial_sd_profile,
    resolution,
    resolved_degree,
    unsensed_arcs,
)
from invert.prior import SmoothnessPrior
from invert.problem import PriorSummary
from invert.stages import Tikhonov

M, N, SIGMA, LAM = 24, 8, 0.3, 0.05


def _ring_problem(M=M, N=N, sigma=SIGMA, radius=1.0, gaps=(), rho=1.0, values=None, rng=0):
    rng = np.random.default_rng(rng)
    th = 2 * np.pi * np.arange(M) / M
    d = Disk(radius, (0.0, 0.0), N)
    pts = d.from_polar(rho, th)
    v = rng.normal(size=M) if values is None else np.asarray(values, float)
    v = v.copy()
    v[list(gaps)] = np.nan
    r = Readings(pts, v, np.full(M, sigma), np.array([f"s{i}" for i in range(M)]))
    return LinearProblem.from_readings(r, d)


@pytest.fixture(scope="module")
def designed():
    pb = _ring_problem()
    est = Tikhonov("fixed", lam=LAM).fit(pb)
    return pb, est


def test_variance_ratio_matches_fourier_closed_form(designed):
    # Closed form of the designed case (module docstring). With sigma given, the stage's prior
    # variance is (1+n^2)^-s / lam, so tau^2 = 1/lam. rtol 1e-8: algebra, limited by the 1e8
    # prior variance ratio of the mean level in the eigen-decomposition of the covariance.
    pb, est = designed
    v = SmoothnessPrior(2.0, 1 / np.sqrt(LAM)).variances(pb.domain.eigenvalues,
                                                          pb.domain.degrees)
    assert prior_variances(est) == pytest.approx(v, rel=1e-12)
    post = np.where(pb.domain.degrees == 0, 1 / (1 / v + M / SIGMA**2),
                    1 / (1 / v + M / (2 * SIGMA**2)))
    res = resolution(est)
    n = np.arange(N + 1)
    vn = (1 + n**2.0) ** -2.0 / LAM
    expected = 1 / (1 + M * vn / (2 * SIGMA**2))
    assert res.variance_ratio[1:] == pytest.approx(expected[1:], rel=1e-8)
    assert res.resolution[1:] == pytest.approx(1 - expected[1:], rel=1e-8)
    assert res.column_resolution == pytest.approx(1 - post / v, rel=1e-8, abs=1e-12)
    # Effective dof = trace(I - Sigma_post Sigma_prior^-1) (Aster et al. 4.4), here a sum.
    assert res.effective_dof == pytest.approx(np.sum(1 - post / v), rel=1e-8)
    # The same trace is the stage's tr(A) (hat-matrix trace), computed independently by SVD.
    assert res.effective_dof == pytest.approx(est.info["effective_dof"], rel=1e-8)


@pytest.mark.parametrize("rho", [1.0, 0.9, 0.7, 0.5, 0.3])
def test_resolved_degree_matches_recomputed_ring_posterior(designed, rho):
    # Brute force: put the M sensors on a ring at radius rho, form the posterior covariance
    # (Sigma_p^-1 + G^T G / sigma^2)^-1 directly (Bishop 2006 eq. 3.51) and read off the highest
    # degree whose resolution 1 - post/prior is >= 1/2. Exact (integer) agreement.
    pb, est = designed
    ring = _ring_problem(rho=rho)
    v = prior_variances(est)
    post = np.linalg.inv(np.diag(1 / v) + ring.G.T @ ring.G / SIGMA**2)
    r = 1 - np.diag(post) / v
    deg = ring.domain.degrees
    ok = [n for n in range(1, N + 1) if r[deg == n].min() >= 0.5]
    expected = max(ok) if ok else 0
    assert resolved_degree(est, [rho], n_readings=M, noise_sd=SIGMA)[0] == expected


def test_resolved_degree_falls_with_depth(designed):
    _, est = designed
    k = resolved_degree(est, np.linspace(0.05, 1, 40), n_readings=M, noise_sd=SIGMA)
    assert np.all(np.diff(k) >= 0) and k[-1] > k[0]


def test_attenuation_is_rho_to_the_n():
    # Definition of the interior damping (the Poisson integral written as a series, Evans PDE
    # §2.2.4): harmonic n scales by rho^n.
    a = attenuation([0.5, 1.0], [0, 1, 3])
    assert a == pytest.approx(np.array([[1, 0.5, 0.125], [1, 1, 1]]), rel=1e-15)


def test_radial_profile_matches_diagonal_posterior(designed):
    # Closed form for a diagonal posterior with equal variance p_n on a_n, b_n:
    # sd^2(rho, theta) = p_0 + sum_n rho^2n p_n at every angle. rtol 1e-8: algebra.
    pb, est = designed
    v = prior_variances(est)
    post = np.where(pb.domain.degrees == 0, 1 / (1 / v + M / SIGMA**2),
                    1 / (1 / v + M / (2 * SIGMA**2)))
    prof = radial_sd_profile(est, n_radii=11, n_angles=36)
    n = np.arange(1, N + 1)
    pn = post[1::2]
    expected = np.sqrt(post[0] + np.sum(prof.rho[:, None] ** (2 * n) * pn, axis=1))
    assert prof.rms_sd == pytest.approx(expected, rel=1e-8)
    assert prof.max_sd == pytest.approx(expected, rel=1e-6)


def _gap_problem():
    # 16 rim sensors, numbers 5, 6, 7 failed: one contiguous gap.
    return _ring_problem(M=16, N=6, gaps=(5, 6, 7), radius=2.0)


def test_unsensed_arc_of_one_contiguous_gap():
    # Definition: rim points farther than half a spacing from every working sensor. Working
    # sensors 4 and 8 at 4h and 8h (h = 2pi/16) leave the arc (4.5h, 7.5h). 1e-12: rounding.
    h = 2 * np.pi / 16
    arcs = unsensed_arcs(_gap_problem())
    assert arcs.shape == (1, 2)
    assert arcs[0] == pytest.approx([4.5 * h, 7.5 * h], abs=1e-12)
    assert unsensed_arcs(_ring_problem(M=16, N=6)).shape == (0, 2)


def test_gap_share_matches_kernel_quadrature(rng):
    # Share of Poisson-kernel mass over the unsensed arc = harmonic measure of the arc (closed
    # form, Garnett & Marshall ch. I) = integral of the kernel over the arc, here by
    # scipy.integrate.quad of invert.geometry.disk.poisson_kernel. 1e-6 as required; quad's own
    # error is below 1e-10 for these smooth integrands (rho <= 0.95).
    pb = _gap_problem()
    (a, b), = unsensed_arcs(pb)
    rho = rng.uniform(0, 0.95, 12)
    th = rng.uniform(-np.pi, np.pi, 12)
    pts = pb.domain.from_polar(rho, th)
    g = gap_dependence(pb, pts)
    R = pb.domain.radius
    for k in range(12):
        q, err = integrate.quad(lambda p: poisson_kernel(rho[k] * R, th[k], p, R), a, b,
                                epsabs=1e-13, epsrel=1e-13, limit=200)
        assert g.share[k] == pytest.approx(q, abs=1e-6)
    # The centre sees the arc in proportion to its length (mean value property).
    assert gap_dependence(pb, [[0.0, 0.0]]).share[0] == pytest.approx((b - a) / (2 * np.pi),
                                                                      abs=1e-12)


@pytest.mark.parametrize("rho", [0.0, 0.3, 0.8, 0.97])
def test_half_mass_width(rho):
    # The arc of width 4 arctan((1-rho)/(1+rho)) centred below the point holds half of the
    # kernel mass: check by quadrature of the kernel (Evans 2.2.4). 1e-9: quad accuracy.
    w = half_mass_width(rho)
    th = 0.7
    q, _ = integrate.quad(lambda p: poisson_kernel(rho, th, p), th - w / 2, th + w / 2,
                          epsabs=1e-13, epsrel=1e-13, limit=200)
    assert q == pytest.approx(0.5, abs=1e-9)


def _estimate_with_mean_noise(sd0=0.2):
    # Field cos(theta) (rim max 1 at theta = 0) plus an uncertain mean level only.
    d = Disk(1.0, (0.0, 0.0), 6)
    mean = np.zeros(d.n_coef)
    mean[1] = 1.0
    cov = np.zeros((d.n_coef, d.n_coef))
    cov[0, 0] = sd0**2
    return Estimate(mean=mean, cov=cov, domain=d, method="test")


def test_pointwise_exceedance_is_normal_tail():
    # P(u > T) = 1 - Phi((T - mean)/sd) for a Gaussian posterior; scipy.stats.norm as oracle.
    est = _estimate_with_mean_noise()
    pts = np.array([[0.5, 0.0], [0.0, 0.3]])
    p = exceedance_probability(est, pts, 0.6)
    assert p == pytest.approx(stats.norm.sf((0.6 - np.array([0.5, 0.0])) / 0.2), rel=1e-12)


def test_max_exceedance_closed_form():
    # Only the mean level is uncertain, so max over the disk = 1 + e, e ~ N(0, 0.2^2) (the
    # maximum principle puts the max of cos(theta) at the rim point theta = 0, on the grid).
    # P(max > 1.1) = 1 - Phi(0.5) = 0.3085. Tolerance 4 Monte-Carlo sd: sqrt(p(1-p)/4000)=0.0073.
    est = _estimate_with_mean_noise()
    res = max_exceedance(est, 1.1, n_draws=4000, rng=3)
    p = stats.norm.sf(0.5)
    assert res.probability == pytest.approx(p, abs=4 * np.sqrt(p * (1 - p) / 4000))
    assert res.mc_se == pytest.approx(np.sqrt(res.probability * (1 - res.probability) / 4000))


def test_maximum_principle_rim_grid_suffices():
    # Maximum principle (Evans 2.2.3): for every draw the maximum over a fine interior grid is
    # at most the maximum over the rim. The rim grid can miss the true rim maximum by at most
    # (dtheta/2)^2/2 * max|u''| <= (dtheta/2)^2/2 * sum n^2 (|a_n| + |b_n|) (Taylor), which
    # is the tolerance used.
    pb = _ring_problem(M=20, N=8, rng=5)
    est = Tikhonov("evidence").fit(pb)
    d = est.domain
    c = est.sample(300, rng=11)
    rim, _ = d.rim_grid(720)
    top_rim = (c @ d.design(rim).T).max(axis=1)
    inner, _ = d.field_grid(61)
    inner = inner[np.hypot(inner[:, 0], inner[:, 1]) < 0.999]
    top_in = (c @ d.design(inner).T).max(axis=1)
    n = d.degrees
    slack = (np.pi / 720) ** 2 / 2 * np.sum(n**2 * np.abs(c), axis=1)
    assert np.all(top_in <= top_rim + slack)
    # And the probability from the rim is therefore never below that from the interior.
    T = float(np.median(top_rim))
    res = max_exceedance(est, T, n_draws=300, n_rim=720, rng=11)
    assert res.probability >= np.mean(top_in > T)


def test_sampled_estimate_uses_conditional_posterior_at_median_hyperparameters(designed):
    # For draws (hyperparameters sampled) the resolution is that of the Gaussian posterior
    # conditional on the posterior-median s and tau, so with the medians of the designed case
    # it must reproduce the same Fourier closed form (rtol 1e-8, algebra).
    pb, est = designed
    draws = est.sample(500, rng=0)
    sampled = Estimate(mean=draws.mean(axis=0), draws=draws, domain=pb.domain, method="mcmc",
                       noise_sd=SIGMA, prior=PriorSummary(s=2.0, tau=1 / np.sqrt(LAM)))
    with pytest.raises(ValueError, match="needs the problem"):
        resolution(sampled)
    res = resolution(sampled, pb)
    n = np.arange(1, N + 1)
    vn = (1 + n**2.0) ** -2.0 / LAM
    assert res.variance_ratio[1:] == pytest.approx(1 / (1 + M * vn / (2 * SIGMA**2)), rel=1e-8)


@pytest.mark.slow
def test_max_exceedance_is_calibrated():
    # Calibration with known truth: truths drawn from the prior the fit uses (tau known, so the
    # Gaussian posterior is exact), a fixed threshold. If the probabilities are right, the
    # number of truths whose maximum exceeds T is a sum of independent Bernoulli(p_k), mean
    # sum p_k and variance sum p_k (1 - p_k); allow 3 sd plus the Monte-Carlo error of p_k.
    rng = np.random.default_rng(123)
    tau, T, n_trials = 1.0, 0.8, 150
    d = Disk(1.0, (0.0, 0.0), 8)
    v = SmoothnessPrior(2.0, tau).variances(d.eigenvalues, d.degrees)
    rim, _ = d.rim_grid(720)
    Hrim = d.design(rim)
    th = 2 * np.pi * np.arange(12) / 12
    pts = np.vstack([d.from_polar(1.0, th), d.from_polar([0.3, 0.6], [1.0, 4.0])])
    hits, probs = [], []
    for _ in range(n_trials):
        c = rng.normal(size=d.n_coef) * np.sqrt(v)
        c[0] = 0.0
        y = d.design(pts) @ c + 0.3 * rng.normal(size=len(pts))
        y[[2, 3]] = np.nan  # two failed sensors: a real gap for the posterior to be unsure of
        r = Readings(pts, y, np.full(len(y), 0.3), np.array([f"s{i}" for i in range(len(y))]))
        est = Tikhonov("fixed", lam=1 / tau**2).fit(LinearProblem.from_readings(r, d))
        probs.append(max_exceedance(est, T, n_draws=1000, rng=rng).probability)
        hits.append((Hrim @ c).max() > T)
    probs, hits = np.array(probs), np.array(hits)
    assert 0.15 < probs.mean() < 0.85  # the threshold is informative, not trivial
    sd = np.sqrt(np.sum(probs * (1 - probs)) + n_trials * 0.25 / 1000)
    assert abs(hits.sum() - probs.sum()) < 3 * sd


def test_pointwise_exceedance_student_t_when_noise_is_estimated():
    # With the noise level estimated the posterior is Student-t on the residual dof: P(u > T)
    # = t.sf((T - mean)/scale, df), scale = sd / sqrt(df/(df-2)) (variance of a t
    # distribution); scipy.stats.t as the oracle, rtol 1e-10 (algebra).
    th = 2 * np.pi * np.arange(20) / 20
    d = Disk(1.0, (0.0, 0.0), 6)
    pts = d.from_polar(1.0, th)
    y = np.cos(th) + 0.1 * np.random.default_rng(2).normal(size=20)
    r = Readings(pts, y, None, np.array([f"s{i}" for i in range(20)]))
    est = Tikhonov("evidence").fit(LinearProblem.from_readings(r, d))
    assert est.df is not None
    q = np.array([[0.95, 0.0], [0.2, 0.5]])
    s = est.at(q)
    scale = s.sd / np.sqrt(est.df / (est.df - 2))
    expected = stats.t.sf((0.9 - s.mean) / scale, est.df)
    assert exceedance_probability(est, q, 0.9) == pytest.approx(expected, rel=1e-10)
