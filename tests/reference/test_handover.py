"""Warm-up starts and hand-over checks of the exact kernel (invert.stages.assimilate.handover).

Sources: the non-increase of the mean mismatch in the filter's metric,
dm_k' P_k^-1 dm_k <= dm_{k-1}' P_{k-1}^-1 dm_{k-1} (P_k <= P^-_k, F' (P^-_k)^-1 F <= P_{k-1}^-1
when Q >= 0; Anderson & Moore 1979, ch. 4; proved in the module docstring), checked on an
independent NumPy Kalman filter (textbook block update, Särkkä 2013, eq. 4.20-4.21) with
general (non-diagonal) F and Q; and the kernel's own exact run (a warm-up that starts where the
log starts is the exact filter; an adjoint warm-up over all the frames after it is the exact
adjoint).
"""

import numpy as np
import pytest

from invert.batch.job import BatchJob
from invert.stages.assimilate.handover import (
    adjoint_mismatch,
    filter_mismatch,
    warm_adjoint,
    warm_filter,
)
from invert.stages.assimilate.kernel import (
    BackwardCarry,
    FilterCarry,
    KernelModel,
    filter_chunk,
    smooth_chunk,
)


def _kf_step(m, P, F, Q, H, R, y):
    """Textbook predict + block update over the observed rows of ``y`` (NaN: missing)."""
    m, P = F @ m, F @ P @ F.T + Q
    o = ~np.isnan(y)
    if o.any():
        Ho = H[o]
        S = Ho @ P @ Ho.T + np.diag(R[o])
        K = np.linalg.solve(S, Ho @ P).T
        m = m + K @ (y[o] - Ho @ m)
        P = P - K @ S @ K.T
        P = 0.5 * (P + P.T)
    return m, P


@pytest.mark.parametrize("seed", range(6))
def test_mean_mismatch_never_grows_in_the_filter_metric(seed):
    rng = np.random.default_rng(seed)
    p, ns, n = int(rng.integers(2, 6)), int(rng.integers(1, 5)), 300
    F = 0.9 * np.linalg.qr(rng.standard_normal((p, p)))[0] + 0.1 * rng.standard_normal((p, p))
    A = rng.standard_normal((p, p))
    Q = 0.05 * A @ A.T * rng.uniform(0.01, 1.0) + 1e-3 * np.eye(p)
    H = rng.standard_normal((ns, p))
    R = rng.uniform(0.1, 1.0, ns)
    Y = rng.standard_normal((n, ns))
    Y[rng.random(Y.shape) < 0.3] = np.nan
    P = np.eye(p) * 2.0
    m1, m2 = np.zeros(p), 3.0 * rng.standard_normal(p)
    d_prev = (m2 - m1) @ np.linalg.solve(P, m2 - m1)
    for y in Y:
        m1, P1 = _kf_step(m1, P, F, Q, H, R, y)
        m2, _ = _kf_step(m2, P, F, Q, H, R, y)
        P = P1
        d = (m2 - m1) @ np.linalg.solve(P, m2 - m1)
        # non-increase, to rounding of the solves: relative 1e-14 * cond(P)
        assert d <= d_prev * (1 + 1e-14 * np.linalg.cond(P)) + 1e-12
        d_prev = d


def _kernel_case(n=600, seed=3):
    rng = np.random.default_rng(seed)
    ns, p = 6, 5
    H = rng.standard_normal((ns, p))
    H[:, 0] = 1.0
    model = KernelModel.build(H, np.full(ns, 0.04), np.r_[100.0, np.full(p - 1, 1.0)],
                              np.r_[1.0, np.full(p - 1, 1.0)], np.r_[True, np.zeros(p - 1, bool)],
                              15.0)
    t = np.cumsum(1.0 + rng.uniform(-0.03, 0.03, n))
    Y = rng.standard_normal((n, ns))
    Y[rng.random(Y.shape) < 0.05] = np.nan
    return model, t, Y


def test_kernel_mismatch_never_grows_frame_by_frame():
    # the same inequality on the compiled kernel (diagonal F, Q), measured by filter_mismatch
    model, t, Y = _kernel_case()
    true = filter_chunk(model, FilterCarry.initial(model), t[:50], Y[:50])[0]
    other = FilterCarry(true.m + np.r_[0.5, -1.0, 2.0, 0.3, 0.1, 0, 0, 0], true.P, true.t,
                        0.0, True)
    prev = filter_mismatch(true, other).mean
    for k in range(50, 400):
        true = filter_chunk(model, true, t[k:k + 1], Y[k:k + 1])[0]
        other = filter_chunk(model, other, t[k:k + 1], Y[k:k + 1])[0]
        mm = filter_mismatch(true, other)
        assert mm.cov <= 1e-12  # same covariances: they do not depend on the means
        assert mm.mean <= prev * (1 + 1e-9) + 1e-13
        prev = mm.mean
    assert prev < 1e-3  # and it does shrink (a few time scales of 15 frames)


def test_warm_starts_at_the_log_ends_are_exact():
    model, t, Y = _kernel_case()
    n = 400
    true, cp, *_ = filter_chunk(model, FilterCarry.initial(model), t[:n], Y[:n], every=64)
    warm = warm_filter(model, t[:n], Y[:n])
    mm = filter_mismatch(true, warm)
    assert mm.mean <= 1e-12 and mm.cov <= 1e-12  # the same recursion, to rounding
    back = smooth_chunk(model, cp, BackwardCarry.final(model), t[:n], Y[:n])[0]
    head = warm_adjoint(model, cp, t[:n], Y[:n], n)
    am = adjoint_mismatch(back, head, cp.P[0])
    assert am.mean <= 1e-12 and am.cov <= 1e-12


def test_short_warm_ups_are_refused_and_long_ones_accepted():
    model, t, Y = _kernel_case()
    a = 500
    true, cp, *_ = filter_chunk(model, FilterCarry.initial(model), t[:a], Y[:a], every=64)
    assert not filter_mismatch(true, warm_filter(model, t[a - 3:a], Y[a - 3:a])).within(1e-10)
    # 23 time scales of 15 frames: the prior forgotten to below 1e-10
    assert filter_mismatch(true, warm_filter(model, t[a - 400:a], Y[a - 400:a])).within(1e-10)
    _, cp2, *_ = filter_chunk(model, true, t[a:], Y[a:], every=64)
    back = smooth_chunk(model, cp2, BackwardCarry.final(model), t[a:], Y[a:])[0]
    assert not adjoint_mismatch(back, warm_adjoint(model, cp2, t[a:], Y[a:], 3),
                                cp2.P[0]).within(1e-10)


@pytest.mark.parametrize(("field", "value", "match"), [
    ("handover_tol", 0.0, "'handover_tol' parameter of batch must be a float in the range"),
    ("warmup", 0, "'warmup' parameter of batch must be an int >= 1 or None. Got 0"),
])
def test_bad_handover_settings_are_refused(tmp_path, field, value, match):
    from invert import make_domain

    kw = {field: value}
    with pytest.raises(ValueError, match=match):
        BatchJob(make_domain(0.25), np.array(["a"]), np.zeros((1, 2)), None, np.zeros((1, 2)),
                 np.array(["c"]), tmp_path, **kw)
