"""Tikhonov stage against scikit-learn, explicit hat matrices and closed forms."""

import warnings

import numpy as np
import pytest
from sklearn.linear_model import BayesianRidge, Ridge, RidgeCV

from invert import Disk, LinearProblem, SmoothnessPrior, Tikhonov
from invert.stages._spectrum import Spectrum
from invert.stages.tikhonov import gcv_score, lcurve_curvature, loo_score, upre_score


def make_problem(rng, m_rim=24, n_probe=4, sigma=0.05, known=True, n_modes=16, gap=True):
    d = Disk(1.0, (0, 0), n_modes)
    v = SmoothnessPrior(2.0).variances(d.eigenvalues, d.degrees)
    v[0] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    th = np.linspace(0, 2 * np.pi, m_rim, endpoint=False)
    if gap:
        th = th[(th < 2.0) | (th > 3.0)]
    pts = np.vstack([d.from_polar(1.0, th),
                     d.from_polar(rng.uniform(0.2, 0.8, n_probe), rng.uniform(0, 6.28, n_probe))])
    y = d.design(pts) @ c + sigma * rng.standard_normal(len(pts))
    s = np.full(len(pts), sigma) if known else None
    return LinearProblem(d.design(pts), y, s, d.degrees, d.eigenvalues, d, points=pts), c


def standard_form(problem, s=2.0):
    d = np.sqrt(SmoothnessPrior(s).shape(problem.eigenvalues, problem.degrees))
    w = problem.weights
    return (w[:, None] * problem.G) * d, w * problem.y, d


def test_fixed_lam_matches_sklearn_ridge(rng):
    # The standard-form problem min ||A x - y||^2 + alpha ||x||^2 is what sklearn's Ridge solves
    # (fit_intercept=False); c = D x. 1e-8: two direct solvers on a condition number ~1e6.
    prob, _ = make_problem(rng)
    A, yt, d = standard_form(prob)
    for lam in [1e-3, 0.1, 10.0]:
        est = Tikhonov("fixed", lam=lam).fit(prob)
        x = Ridge(alpha=lam, fit_intercept=False, solver="svd").fit(A, yt).coef_
        np.testing.assert_allclose(est.mean, d * x, rtol=1e-8, atol=1e-10)


def test_loo_choice_matches_sklearn_ridgecv(rng):
    # sklearn's RidgeCV with the default efficient leave-one-out picks, from the same grid, the
    # same alpha as our loo rule's grid scan (RidgeCV is LOO, not GCV: sklearn issue #18079).
    prob, _ = make_problem(rng, known=False)
    A, yt, _ = standard_form(prob)
    tk = Tikhonov("loo", min_residual_dof=0.0, n_grid=60)
    tk.fit(prob)
    ref = RidgeCV(alphas=tk.grid_, fit_intercept=False).fit(A, yt)
    assert tk.grid_[np.argmin(tk.scores_)] == pytest.approx(ref.alpha_, rel=1e-12)
    np.testing.assert_allclose(tk.scores_ * 0 + loo_score(Spectrum(prob, np.sqrt(
        SmoothnessPrior(2.0).shape(prob.eigenvalues, prob.degrees))), tk.grid_), tk.scores_)


def test_loo_score_equals_refitting(rng):
    # Brute force: refit m times without reading i (Ridge) and predict it (definition of LOO).
    prob, _ = make_problem(rng, m_rim=16, n_probe=2)
    A, yt, d = standard_form(prob)
    spec = Spectrum(prob, d)
    lam = 0.03
    err = []
    for i in range(len(yt)):
        keep = np.arange(len(yt)) != i
        x = Ridge(alpha=lam, fit_intercept=False, solver="svd").fit(A[keep], yt[keep]).coef_
        err.append(yt[i] - A[i] @ x)
    assert loo_score(spec, lam)[0] == pytest.approx(np.mean(np.square(err)), rel=1e-9)


def test_evidence_choice_matches_bayesian_ridge(rng):
    # Type-II ML (MacKay 1992; Bishop 2006 3.5): sklearn's BayesianRidge without hyperpriors
    # gives weight precision lambda_ and noise precision alpha_ (names swapped relative to
    # Bishop); their ratio is our lam. 1e-4: BayesianRidge's fixed-point iteration tolerance.
    prob, _ = make_problem(rng, m_rim=32, n_probe=5, sigma=0.1, known=False)
    A, yt, _ = standard_form(prob)
    br = BayesianRidge(fit_intercept=False, tol=1e-12, max_iter=100000, alpha_1=0, alpha_2=0,
                       lambda_1=0, lambda_2=0, compute_score=False).fit(A, yt)
    tk = Tikhonov("evidence", min_residual_dof=0.0)
    est = tk.fit(prob)
    assert tk.lam_ == pytest.approx(br.lambda_ / br.alpha_, rel=1e-4)
    _, _, d = standard_form(prob)
    np.testing.assert_allclose(est.mean, d * br.coef_, rtol=1e-4, atol=1e-6)


def test_log_evidence_is_gaussian_logpdf(rng):
    # log p(y) = log N(y | 0, G Sigma_p G^T + Sigma_e) (Bishop 2006 eq. 3.86; Rasmussen & Williams
    # 2006 eq. 2.30).
    from scipy.stats import multivariate_normal

    prob, _ = make_problem(rng, m_rim=12, n_probe=2, sigma=0.2)
    _, yt, d = standard_form(prob)
    d[0] = 3.0  # a moderate mean-level prior keeps the dense covariance well conditioned
    spec = Spectrum(prob, d)
    lam = 0.7
    cov = prob.G @ np.diag(d**2 / lam) @ prob.G.T + np.diag(prob.sigma**2)
    ref = multivariate_normal(np.zeros(len(yt)), cov).logpdf(prob.y)
    assert spec.log_evidence(lam, True)[0] == pytest.approx(ref, rel=1e-9)


def test_gcv_equals_hat_matrix_definition_and_brute_force(rng):
    # V(alpha) = (1/m)||(I - A)y||^2 / [(1/m) tr(I - A)]^2 (Golub, Heath & Wahba 1979), with the
    # hat matrix A = A~(A~^T A~ + alpha I)^-1 A~^T formed explicitly. 1e-10: algebra.
    prob, _ = make_problem(rng, known=False)
    A, yt, d = standard_form(prob)
    spec = Spectrum(prob, d)
    m, p = A.shape

    def brute(alpha):
        H = A @ np.linalg.solve(A.T @ A + alpha * np.eye(p), A.T)
        r = yt - H @ yt
        return (r @ r / m) / (np.trace(np.eye(m) - H) / m) ** 2

    for alpha in [1e-4, 1e-2, 1.0]:
        assert gcv_score(spec, alpha)[0] == pytest.approx(brute(alpha), rel=1e-8)
    tk = Tikhonov("gcv", min_residual_dof=0.0)
    tk.fit(prob)
    fine = np.logspace(np.log10(tk.lam_) - 1, np.log10(tk.lam_) + 1, 801)
    best = fine[np.argmin([brute(a) for a in fine])]
    assert tk.lam_ == pytest.approx(best, rel=0.01)  # grid step of the brute scan is 0.6 %


def test_lcurve_curvature_matches_finite_differences(rng):
    # Hansen's closed-form curvature vs finite-difference curvature of (log sqrt(rho),
    # log sqrt(eta)) against log lambda (Hansen & O'Leary 1993; checked to agree to ~6 digits).
    prob, _ = make_problem(rng)
    _, _, d = standard_form(prob)
    spec = Spectrum(prob, d)
    lam = np.logspace(-3, 0, 7)
    t = np.log(lam)
    h = 1e-4

    def xy(tt):
        a = np.exp(2 * tt)
        return 0.5 * np.log(spec.residual2(a)), 0.5 * np.log(spec.solution_norm2(a))

    (x0, y0), (xp, yp), (xm, ym) = xy(t), xy(t + h), xy(t - h)
    x1, y1 = (xp - xm) / (2 * h), (yp - ym) / (2 * h)
    x2, y2 = (xp - 2 * x0 + xm) / h**2, (yp - 2 * y0 + ym) / h**2
    kappa_fd = (x1 * y2 - x2 * y1) / (x1**2 + y1**2) ** 1.5
    np.testing.assert_allclose(lcurve_curvature(spec, lam**2), kappa_fd, rtol=1e-5)


def test_discrepancy_and_upre(rng):
    # Discrepancy principle (Morozov 1984): the chosen alpha puts chi^2 on the target 1.05^2 m;
    # the residual is increasing in alpha. UPRE (Mallows' C_p) minimiser agrees with a scan.
    prob, _ = make_problem(rng, m_rim=40, n_probe=4, sigma=0.05)
    tk = Tikhonov("discrepancy")
    tk.fit(prob)
    spec = Spectrum(prob, standard_form(prob)[2])
    assert spec.residual2(tk.lam_)[0] == pytest.approx(1.05**2 * prob.n_readings, rel=1e-8)
    r = spec.residual2(tk.grid_)
    assert np.all(np.diff(r) >= -1e-12)
    tu = Tikhonov("upre", min_residual_dof=0.0)
    tu.fit(prob)
    fine = np.logspace(np.log10(tu.lam_) - 1, np.log10(tu.lam_) + 1, 801)
    assert tu.lam_ == pytest.approx(fine[np.argmin(upre_score(spec, fine))], rel=0.01)


def test_discrepancy_recovers_noise_level(rng):
    # With sigma unknown, the discrepancy idea run backwards: the residual-based estimate
    # rss/(m - dof) at the chosen lam is close to the true sigma (Wahba 1983). 25 %: the
    # estimate has ~m - dof = O(30) degrees of freedom, sd about 13 %.
    ratios = []
    for seed in range(10):
        prob, _ = make_problem(np.random.default_rng(seed), m_rim=64, n_probe=4, sigma=0.05,
                               known=False, n_modes=16, gap=False)
        est = Tikhonov("gcv").fit(prob)
        ratios.append(est.info["noise_sd"] / 0.05)
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.25)


def test_rules_needing_sigma_refuse_without_it(rng):
    prob, _ = make_problem(rng, known=False)
    with pytest.raises(ValueError, match="needs the noise sd"):
        Tikhonov("upre").fit(prob)
    with pytest.raises(ValueError, match="must be one of"):
        Tikhonov("nope").fit(prob)


def test_strong_smoothing_leaves_weighted_mean(rng):
    # lam -> infinity leaves only the (broad-prior) mean level: the 1/sigma^2-weighted mean of
    # the readings (limit of ridge with an unpenalised intercept; common practice).
    prob, _ = make_problem(rng)
    s = prob.sigma.copy()
    s[::3] *= 3
    prob = LinearProblem(prob.G, prob.y, s, prob.degrees, prob.eigenvalues, prob.domain)
    est = Tikhonov("fixed", lam=1e6).fit(prob)
    w = 1 / s**2
    assert est.values([[0.3, 0.1], [0.0, -0.9]]) == pytest.approx(np.sum(w * prob.y) / w.sum(),
                                                                  abs=1e-3)


def test_duplicated_readings_act_like_halved_variance(rng):
    # Each reading given twice with sd sigma = each once with sd sigma/sqrt(2) (Gaussian
    # likelihood algebra; sklearn's Ridge vstacked-X test uses the same fact).
    prob, _ = make_problem(rng)
    dup = LinearProblem(np.vstack([prob.G, prob.G]), np.r_[prob.y, prob.y],
                        np.r_[prob.sigma, prob.sigma], prob.degrees, prob.eigenvalues, prob.domain)
    half = LinearProblem(prob.G, prob.y, prob.sigma / np.sqrt(2), prob.degrees, prob.eigenvalues,
                         prob.domain)
    a = Tikhonov("fixed", lam=0.1).fit(dup)
    b = Tikhonov("fixed", lam=0.1).fit(half)
    np.testing.assert_allclose(a.mean, b.mean, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(a.cov, b.cov, rtol=1e-7, atol=1e-12)


def test_rotation_invariance(rng):
    # Rotating every sensor by delta rotates the estimated field by delta (the prior is
    # rotation invariant: common practice for stationary priors on the circle).
    prob, _ = make_problem(rng)
    d = prob.domain
    delta = 0.7
    rho, th = d.to_polar(prob.points)
    rot = d.from_polar(rho, th + delta)
    prob2 = LinearProblem(d.design(rot), prob.y, prob.sigma, d.degrees, d.eigenvalues, d)
    a = Tikhonov("evidence").fit(prob)
    b = Tikhonov("evidence").fit(prob2)
    q = d.from_polar([0.2, 0.6, 1.0], [0.3, 2.0, 4.0])
    qr = d.from_polar([0.2, 0.6, 1.0], np.array([0.3, 2.0, 4.0]) + delta)
    np.testing.assert_allclose(a.at(q).mean, b.at(qr).mean, rtol=1e-7)
    np.testing.assert_allclose(a.at(q).sd, b.at(qr).sd, rtol=1e-6)


@pytest.mark.parametrize("k", [1, 2, 3, 5, 8])
def test_harmonic_polynomials_recovered(k):
    # Re z^k and Im z^k are reproduced from exact dense rim values (closed form), to 1e-6 with
    # noise sd 1e-7 (the smoothing bias is of the order of the noise).
    d = Disk(1.0, (0, 0), 16)
    th = np.linspace(0, 2 * np.pi, 48, endpoint=False)
    pts = d.from_polar(1.0, th)
    y = np.cos(k * th) + 0.5 * np.sin(k * th)
    prob = LinearProblem(d.design(pts), y, np.full(48, 1e-7), d.degrees, d.eigenvalues, d)
    est = Tikhonov("evidence").fit(prob)
    q = d.from_polar([0.0, 0.4, 0.8, 1.0], [0.0, 1.0, 2.0, 5.0])
    rho, t = d.to_polar(q)
    np.testing.assert_allclose(est.values(q), rho**k * (np.cos(k * t) + 0.5 * np.sin(k * t)),
                               atol=1e-6)


def test_log_distance_recovered_from_dense_data():
    # log|z - z0|, z0 = 2.5 e^{0.4i} outside, recovered from 64 exact rim values within 1e-4
    # (prior smoothing bias with sigma = 1e-6; closed-form truth).
    d = Disk(1.0, (0, 0), 24)
    th = np.linspace(0, 2 * np.pi, 64, endpoint=False)
    z0 = 2.5 * np.exp(0.4j)
    y = np.log(np.abs(np.exp(1j * th) - z0))
    prob = LinearProblem(d.design(d.from_polar(1.0, th)), y, np.full(64, 1e-6), d.degrees,
                         d.eigenvalues, d)
    est = Tikhonov().fit(prob)
    q = d.from_polar([0.0, 0.5, 0.9], [0.0, 0.4, 3.0])
    z = q[:, 0] + 1j * q[:, 1]
    np.testing.assert_allclose(est.values(q), np.log(np.abs(z - z0)), atol=1e-4)


def test_arc_step_recovered_in_interior():
    # A step on the rim arc [-pi/2, pi/2] seen by 120 sensors (values 0/1): inside, the field is
    # the half-disk harmonic measure 1/2 + (2/pi) arctan x (Garnett & Marshall 2005, ch. I). 0.02: a
    # step is not
    # smooth, so a smoothness prior blurs it; the blur decays inward.
    d = Disk(1.0, (0, 0), 60)
    th = (np.arange(120) + 0.5) * 2 * np.pi / 120
    y = (np.cos(th) > 0).astype(float)
    prob = LinearProblem(d.design(d.from_polar(1.0, th)), y, np.full(120, 1e-3), d.degrees,
                         d.eigenvalues, d)
    est = Tikhonov(s=1.0).fit(prob)
    xs = np.linspace(-0.6, 0.6, 7)
    np.testing.assert_allclose(est.values(np.c_[xs, 0 * xs]), 0.5 + 2 / np.pi * np.arctan(xs),
                               atol=0.02)


def test_warning_when_rule_wants_interpolation(rng):
    prob, _ = make_problem(rng, m_rim=13, n_probe=0, sigma=0.001, known=False, gap=False)
    with warnings.catch_warnings(record=True):
        warnings.simplefilter("always")
        est = Tikhonov("gcv").fit(prob)
    assert est.info["residual_dof"] >= 3 - 1e-9
