"""Kalman filter / RTS smoother of the coefficients (invert.stages.assimilate).

Oracles: the dense joint Gaussian posterior of the stacked linear model (Rauch, Tung & Striebel
1965: the RTS smoother is exact for linear Gaussian models; Särkkä 2013, Thm 8.2) and
scipy.stats.multivariate_normal.logpdf for the prediction-error log-likelihood (Harvey 1989).
"""

import numpy as np
import pytest
from scipy import stats

from invert.geometry.disk import Disk
from invert.prior import SmoothnessPrior
from invert.stages.assimilate import (
    CoefficientDynamics,
    FilterState,
    KalmanSmoother,
    filter_segment,
    fit_time_scale,
    linear_recursion,
    log_likelihood,
    run_smoother,
)


def _small_model(time_scale=3.0, n_modes=2, n_sensors=6):
    d = Disk(1.0, (0.0, 0.0), n_modes)
    th = np.linspace(0, 2 * np.pi, n_sensors, endpoint=False)
    pts = np.c_[np.cos(th), np.sin(th)]
    pts[1] *= 0.5  # one interior probe
    shape = SmoothnessPrior(s=2.0).shape(d.eigenvalues, d.degrees)
    return d, CoefficientDynamics.from_prior(d.design(pts), np.full(len(pts), 0.1**2), shape,
                                             d.degrees, tau2=1.0, time_scale=time_scale,
                                             mean_var=100.0)


def _stacked(model, t, Y):
    """Dense joint prior of (c_1..c_T) and the stacked observation rows."""
    T, p = len(t), model.n_coef
    fs, qs = zip(*[model.transition(np.nan if k == 0 else t[k] - t[k - 1]) for k in range(T)],
                 strict=True)
    B = np.zeros((T * p, T * p))
    for k in range(T):
        for j in range(k + 1):
            phi = np.prod([fs[i] for i in range(j + 1, k + 1)], axis=0) if k > j else np.ones(p)
            B[k * p:(k + 1) * p, j * p:(j + 1) * p] = np.diag(phi)
    w = np.concatenate([model.prior_var] + [qs[k] for k in range(1, T)])
    Sx = (B * w) @ B.T
    rows, yo, rv = [], [], []
    for k in range(T):
        for i in np.flatnonzero(np.isfinite(Y[k])):
            r = np.zeros(T * p)
            r[k * p:(k + 1) * p] = model.H[i]
            rows.append(r)
            yo.append(Y[k, i])
            rv.append(model.noise_var[i])
    return Sx, np.array(rows), np.array(yo), np.array(rv)


@pytest.fixture
def problem():
    rng = np.random.default_rng(42)
    _, model = _small_model()
    T = 14
    t = np.cumsum(rng.uniform(0.2, 2.0, T))  # irregular steps
    Y = rng.normal(size=(T, model.H.shape[0]))
    Y[rng.random(Y.shape) < 0.3] = np.nan  # random missing entries
    Y[5] = np.nan  # one step with no reading at all
    return model, t, Y


def test_smoother_equals_dense_posterior(problem):
    # Rauch, Tung & Striebel (1965): for a linear Gaussian model the smoothed means and
    # covariances are the marginals of the joint posterior, here by dense conditioning
    # (Bishop 2006 eq. 2.81-2.82). Tolerance: algebra (1e-9 relative to the prior scale 100
    # of the mean level, whose variance drives the conditioning).
    model, t, Y = problem
    Sx, Hs, yo, rv = _stacked(model, t, Y)
    C = Hs @ Sx @ Hs.T + np.diag(rv)
    gain = np.linalg.solve(C, Hs @ Sx).T
    mean = (gain @ yo).reshape(len(t), -1)
    cov = Sx - gain @ Hs @ Sx
    for seg in (100, 4):  # one segment, and segments passing the state between them
        res = run_smoother(model, t, Y, steady_tol=0, segment=seg)
        np.testing.assert_allclose(res.mean, mean, rtol=0, atol=1e-9)
        p = model.n_coef
        for k in range(len(t)):
            np.testing.assert_allclose(res.cov(k), cov[k * p:(k + 1) * p, k * p:(k + 1) * p],
                                       rtol=0, atol=1e-8)


def test_loglik_equals_stacked_logpdf(problem):
    # Prediction-error decomposition (Harvey 1989): the filter's sum of log N(v_k | 0, S_k)
    # equals the joint log-density of all observed values, scipy.stats.multivariate_normal.
    # Tolerance: algebra, 1e-9 relative.
    model, t, Y = problem
    Sx, Hs, yo, rv = _stacked(model, t, Y)
    ref = stats.multivariate_normal(np.zeros(len(yo)), Hs @ Sx @ Hs.T + np.diag(rv)).logpdf(yo)
    assert log_likelihood(model, t, Y, steady_tol=0) == pytest.approx(ref, rel=1e-9)
    assert log_likelihood(model, t, Y, steady_tol=0, segment=3) == pytest.approx(ref, rel=1e-9)


def test_steady_state_matches_exact_recursion():
    # Freezing the gain once it stops changing (relative 1e-10) must not move the answer
    # beyond that order: means agree to 1e-7 absolute on readings of order 20.
    rng = np.random.default_rng(3)
    _, model = _small_model(time_scale=50.0, n_modes=4, n_sensors=12)
    T = 1500
    t = np.arange(T, dtype=float)
    Y = 20 + 0.1 * rng.standard_normal((T, 12))
    Y[300:700, 2] = np.nan  # a drop-out episode
    Y[900:1000] = np.nan    # all channels lost for a while
    exact = run_smoother(model, t, Y, steady_tol=0)
    fast = run_smoother(model, t, Y, steady_tol=1e-10, segment=400)
    assert len(fast.cov_table) < T / 2  # the shortcut was used
    np.testing.assert_allclose(fast.mean, exact.mean, rtol=0, atol=1e-7)
    for k in range(0, T, 37):
        np.testing.assert_allclose(fast.cov(k), exact.cov(k), rtol=0, atol=1e-9)
    assert fast.loglik == pytest.approx(exact.loglik, rel=1e-8)


@pytest.mark.parametrize("reverse", [False, True])
def test_linear_recursion_eigen_path_matches_loop(reverse):
    # x_k = Phi x_{k-1} + u_k evaluated in the eigenbasis (scipy.signal.lfilter per component)
    # against the plain loop; tolerance from rounding in the basis change (cond(V) * eps * L).
    rng = np.random.default_rng(0)
    A = rng.standard_normal((6, 6))
    S = A @ A.T + np.eye(6)
    Phi = np.linalg.solve(S + np.eye(6), S)  # real spectrum in (0, 1)
    U = rng.standard_normal((500, 6))
    x0 = rng.standard_normal(6)
    got = linear_recursion(Phi, U, x0, reverse=reverse)
    X, x = np.empty_like(U), x0
    for k in (range(499, -1, -1) if reverse else range(500)):
        x = Phi @ x + U[k]
        X[k] = x
    np.testing.assert_allclose(got, X, rtol=0, atol=1e-10)


def _simulate(model, t, rng):
    """Draw coefficients from the model's own dynamics and readings with its noise."""
    p = model.n_coef
    c = np.empty((len(t), p))
    c[0] = np.sqrt(model.prior_var) * rng.standard_normal(p)
    for k in range(1, len(t)):
        f, q = model.transition(t[k] - t[k - 1])
        c[k] = f * c[k - 1] + np.sqrt(q) * rng.standard_normal(p)
    Y = c @ model.H.T + np.sqrt(model.noise_var) * rng.standard_normal((len(t), len(model.H)))
    return c, Y


def test_time_scale_by_maximum_likelihood_recovers_truth():
    # Simulated from the model with T = 40: the ML estimate is within a factor 1.5 (about
    # 3 standard errors for 3000 frames of 12 readings, from the curvature of the likelihood).
    rng = np.random.default_rng(7)
    _, model = _small_model(time_scale=40.0, n_modes=4, n_sensors=12)
    t = np.arange(3000, dtype=float)
    _, Y = _simulate(model, t, rng)
    T, ll = fit_time_scale(model, t, Y)
    assert 40 / 1.5 < T < 40 * 1.5
    # the optimum is not beaten by any nearby value (scipy's bounded Brent search)
    for other in (T * 0.8, T * 1.25):
        assert log_likelihood(model.with_time_scale(other), t, Y) <= ll + 1e-6


@pytest.mark.slow
def test_smoothing_beats_per_frame_inversion_and_covers():
    # Seeded simulation: slowly drifting field (T = 200 steps), 16 rim sensors with
    # intermittent drop-outs. The smoother's error at interior points is lower than the
    # per-frame Tikhonov fit with the same prior and noise, and its 90 % intervals cover the
    # truth 85-95 % of the time (nominal 90 %; band wider than the binomial 2 sd because
    # frames are strongly correlated in time).
    from invert.batch.runner import StaticInverter

    rng = np.random.default_rng(11)
    d = Disk(1.0, (0.0, 0.0), 8)
    th = np.linspace(0, 2 * np.pi, 16, endpoint=False)
    pts = np.c_[np.cos(th), np.sin(th)]
    noise_sd, tau2 = 0.2, 1.0
    shape = SmoothnessPrior(s=2.0).shape(d.eigenvalues, d.degrees)
    model = CoefficientDynamics.from_prior(d.design(pts), np.full(16, noise_sd**2), shape,
                                           d.degrees, tau2=tau2, time_scale=200.0)
    T = 2000
    t = np.arange(T, dtype=float)
    c, Y = _simulate(model, t, rng)
    for _ in range(30):
        a, j = rng.integers(T), rng.integers(16)
        Y[a:a + rng.integers(20, 200), j] = np.nan
    q = np.array([[0.0, 0.0], [0.5, 0.2], [-0.3, -0.6], [0.8, 0.0]])
    Hq = d.design(q)
    truth = c @ Hq.T
    fit = KalmanSmoother(time_scale=200.0).fit(model, t, Y)
    mean, sd = fit.at(Hq)
    inv = StaticInverter(d, pts, None, noise_sd**2 / tau2, noise_sd, q)
    ok = np.isfinite(Y).sum(1) >= 2
    smean = inv.solve(Y[ok])[0]
    rmse_kf = np.sqrt(np.mean((mean[ok] - truth[ok]) ** 2))
    rmse_static = np.sqrt(np.mean((smean - truth[ok]) ** 2))
    assert rmse_kf < 0.8 * rmse_static
    z = stats.norm.ppf(0.95)
    cover = np.mean(np.abs(mean - truth) <= z * sd)
    assert 0.85 <= cover <= 0.95


def test_filter_state_is_not_changed():
    # the filter returns new state objects and leaves its input as it was (no hidden state)
    _, model = _small_model()
    s0 = FilterState.initial(model)
    m0, P0 = s0.m.copy(), s0.P.copy()
    filter_segment(model, s0, np.arange(5.0), np.ones((5, 6)))
    np.testing.assert_array_equal(s0.m, m0)
    np.testing.assert_array_equal(s0.P, P0)


def test_bad_time_scale_message():
    with pytest.raises(ValueError, match="The 'time_scale' parameter of CoefficientDynamics"):
        _small_model(time_scale=-1.0)


def test_chunk_elements_combine_to_the_sequential_smoother(problem):
    # Särkkä & García-Fernández (2021): filtering and smoothing elements of chunks, combined
    # in order (a scan over chunk summaries), give the filtered state entering each chunk and
    # the smoothed state leaving it; running each chunk from those states reproduces the
    # sequential smoother. Tolerance: algebra (1e-9, prior scale 100 on the mean level).
    from invert.stages.assimilate import (
        SmootherState,
        combine_filter,
        combine_smoother,
        filter_summary,
        smooth_segment,
        smoother_summary,
    )

    model, t, Y = problem
    ref = run_smoother(model, t, Y, steady_tol=0)
    _, filt = filter_segment(model, FilterState.initial(model), t, Y, steady_tol=0)
    cuts = [0, 4, 9, len(t)]
    sums = [filter_summary(model, t[a:b], Y[a:b], t_prev=t[a - 1] if a else np.nan,
                           first=a == 0) for a, b in zip(cuts[:-1], cuts[1:], strict=True)]
    segs, acc = [], None
    for i, (a, b) in enumerate(zip(cuts[:-1], cuts[1:], strict=True)):
        if acc is None:
            st = FilterState.initial(model)
        else:
            st = FilterState(acc[1].copy(), acc[2].copy(), t=t[a - 1])
        st, seg = filter_segment(model, st, t[a:b], Y[a:b], steady_tol=0)
        np.testing.assert_allclose(seg.m, filt.m[a:b], rtol=0, atol=1e-9)
        segs.append(seg)
        acc = sums[i] if acc is None else combine_filter(acc, sums[i])
        np.testing.assert_allclose(acc[1], st.m, rtol=0, atol=1e-9)  # filtered mean at end
        np.testing.assert_allclose(acc[2], st.P, rtol=0, atol=1e-8)
    # backward: summaries of later chunks give the smoothed state at each chunk's end
    nxt = [segs[i + 1].pred_table[segs[i + 1].pid[0]] if i + 1 < len(segs) else None
           for i in range(len(segs))]
    ssum = [smoother_summary(segs[i], nxt[i]) for i in range(len(segs))]
    back = None
    for i in range(len(segs) - 1, -1, -1):
        if back is None:
            state = SmootherState()
        else:
            state = SmootherState(back[1], back[2], (int(segs[i + 1].pid[0]),) + tuple(nxt[i]))
        _, ms, _, _ = smooth_segment(segs[i], state, steady_tol=0)
        a, b = cuts[i], cuts[i + 1]
        np.testing.assert_allclose(ms, ref.mean[a:b], rtol=0, atol=1e-9)
        back = ssum[i] if back is None else combine_smoother(ssum[i], back)
        np.testing.assert_allclose(back[1], ref.mean[a], rtol=0, atol=1e-9)
        np.testing.assert_allclose(back[2], ref.cov(a), rtol=0, atol=1e-8)
