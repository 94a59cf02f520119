r"""Kalman filter of the coefficients over a segment of frames, with the steady-state shortcut.

The batch driver (:mod:`invert.batch.runner`) feeds logged frames through
:func:`filter_segment` a segment at a time, so memory stays bounded however long the log is.

Notes
-----
Filter (Särkkä 2013, Thm 4.2): :math:`m^- = Fm`, :math:`P^- = FPF^\top + Q`, then the
measurement update (:func:`measurement_update`): :math:`v = y_o - H_o m^-`,
:math:`S = H_o P^- H_o^\top + R_{oo}`, :math:`K = P^-H_o^\top S^{-1}`, :math:`m = m^- + Kv`,
:math:`P = (I-KH_o)P^-(I-KH_o)^\top + KR_{oo}K^\top` (Joseph form). Log-likelihood by the
prediction-error decomposition, :math:`\sum_k \log N(v_k \mid 0, S_k)` (Harvey 1989); the
time scale :math:`T` is chosen by maximising it (:func:`fit_time_scale`).

Steady state: once the gain and covariance change by less than ``steady_tol`` (relative) from
one frame to the next, with the same drop-out pattern and time step, they are frozen for the
rest of the run and the means follow the linear recursion :math:`m_k = \Phi m_{k-1} + K y_k`,
:math:`\Phi = (I - KH_o)F` (:func:`~invert.stages.assimilate.recursion.linear_recursion`).
``steady_tol=0`` gives the exact recursion at every frame.

References
----------
.. [1] S. Särkkä, *Bayesian Filtering and Smoothing*, Cambridge University Press, 2013,
       Thm 4.2. doi:10.1017/CBO9781139344203
.. [2] A. C. Harvey, *Forecasting, Structural Time Series Models and the Kalman Filter*,
       Cambridge University Press, 1989 (prediction-error decomposition).
.. [3] R. S. Bucy and P. D. Joseph, *Filtering for Stochastic Processes with Applications to
       Guidance*, Interscience, 1968 (Joseph form).
.. [4] E. K.-W. Chu, H.-Y. Fan and W.-W. Lin, "A structure-preserving doubling algorithm for
       continuous-time algebraic Riccati equations", Linear Algebra Appl. 396:55–80, 2005.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .._search import grid_then_refine
from .recursion import close_relative, linear_recursion

__all__ = ["FilterSegment", "FilterState", "MeasurementUpdate", "filter_segment",
           "exact_loglik", "fit_time_scale", "information_update", "innovation_terms",
           "is_diagonal", "log_likelihood", "measurement_update"]

_LOG2PI = float(np.log(2 * np.pi))


@dataclass
class FilterState:
    """What the filter carries from one segment to the next (small; stored in checkpoints)."""

    m: np.ndarray
    P: np.ndarray
    t: float = np.nan
    key: tuple | None = None
    frozen: dict | None = None
    prev: dict | None = None
    loglik: float = 0.0
    n_frames: int = 0
    next_id: int = 0
    fixed: dict = field(default_factory=dict)

    @classmethod
    def initial(cls, model):
        """Return the prior at the first frame: mean zero, covariance ``diag(prior_var)``."""
        return cls(np.zeros(model.n_coef), np.diag(model.prior_var))


@dataclass
class FilterSegment:
    """Filtered means and covariance records of one segment of frames."""

    t: np.ndarray
    m: np.ndarray                 # (L, p) filtered means
    fid: np.ndarray               # (L,) key into P_table (filtered covariance)
    pid: np.ndarray               # (L,) key into pred_table (f, P^-) used to reach frame k
    P_table: dict = field(default_factory=dict)
    pred_table: dict = field(default_factory=dict)
    loglik: np.ndarray = None     # (L,) log N(v_k | 0, S_k) (0 for frames without data)
    nis: np.ndarray = None        # (L,) normalised innovation squared v' S^-1 v
    n_used: np.ndarray = None     # (L,)


@dataclass(frozen=True)
class MeasurementUpdate:
    """Result of :func:`measurement_update` (``m`` and ``v`` are None without readings)."""

    m: np.ndarray | None
    P: np.ndarray
    K: np.ndarray
    S: np.ndarray
    Sinv: np.ndarray
    IKH: np.ndarray
    v: np.ndarray | None


def measurement_update(P, H, r, *, m=None, y=None, joseph=True):
    r"""Update a Gaussian state by readings :math:`y = Hx + e` (Kalman).

    Parameters
    ----------
    P : ndarray of shape (p, p)
        Prior (predicted) covariance.
    H : ndarray of shape (k, p)
        Design rows of the readings.
    r : ndarray of shape (k,)
        Noise variances of the readings.
    m : ndarray of shape (p,), optional
        Prior mean; with ``y``, the mean is updated too.
    y : ndarray of shape (k,), optional
        The readings.
    joseph : bool, default=True
        Posterior covariance in Joseph form, :math:`(I-KH)P(I-KH)^\top + KRK^\top` (stays
        positive semi-definite under rounding); else :math:`(I-KH)P`.

    Returns
    -------
    MeasurementUpdate

    Notes
    -----
    :math:`S = HPH^\top + R`, :math:`K = PH^\top S^{-1}`, :math:`v = y - Hm`,
    :math:`m^+ = m + Kv` (Särkkä 2013, Thm 4.2; Joseph form: Bucy & Joseph 1968). ``S^{-1}``
    and the covariance are symmetrised, :math:`\tfrac12(X + X^\top)`.
    """
    PHt = P @ H.T
    S = H @ PHt + np.diag(r)
    Sinv = np.linalg.inv(S)
    Sinv = 0.5 * (Sinv + Sinv.T)
    K = PHt @ Sinv
    IKH = np.eye(P.shape[0]) - K @ H
    Pn = IKH @ P @ IKH.T + (K * r) @ K.T if joseph else IKH @ P
    Pn = 0.5 * (Pn + Pn.T)
    v = mn = None
    if m is not None:
        v = y - H @ m
        mn = m + K @ v
    return MeasurementUpdate(mn, Pn, K, S, Sinv, IKH, v)


def information_update(d, H, r, *, m=None, y=None):
    r"""Update a Gaussian state with diagonal covariance by readings, in information form.

    The same posterior as :func:`measurement_update` with ``P = diag(d)``, computed without
    the cancellation of the covariance form when ``d`` is broad (a mean-level prior variance
    of 1e8 beside readings of variance 1e-4 loses ~1e-4 relative there).

    Parameters
    ----------
    d : ndarray of shape (p,)
        Diagonal of the prior covariance (all > 0).
    H, r, m, y : as in :func:`measurement_update`.

    Returns
    -------
    MeasurementUpdate
        ``S`` is formed as :math:`HDH^\top + R` for reference only; ``Sinv`` is from the
        Woodbury identity, :math:`S^{-1} = R^{-1} - R^{-1}HPH^\top R^{-1}`.

    Notes
    -----
    Information form (Anderson & Moore 1979, sec. 6.3): :math:`J = D^{-1} + H^\top R^{-1}H`
    (Cholesky), :math:`P^+ = J^{-1}`, :math:`K = P^+H^\top R^{-1}`, :math:`m^+ = m + Kv`.
    The log-determinant and the quadratic form of the innovations follow from the matrix
    determinant lemma, :math:`\log|S| = \log|R| + \log|D| + \log|J|`, and from
    :math:`v^\top S^{-1}v = (y - Hm^+)^\top R^{-1}(y - Hm^+) + (m^+ - m)^\top D^{-1}(m^+ - m)`
    (:func:`innovation_terms`).
    """
    d = np.asarray(d, float)
    w = 1.0 / np.asarray(r, float)
    J = (H.T * w) @ H
    J[np.diag_indices_from(J)] += 1.0 / d
    Lc = np.linalg.cholesky(J)
    Li = np.linalg.inv(Lc)
    Pn = Li.T @ Li
    Pn = 0.5 * (Pn + Pn.T)
    K = (Pn @ H.T) * w[None, :]
    IKH = np.eye(len(d)) - K @ H
    HP = H @ Pn
    Sinv = np.diag(w) - (w[:, None] * (HP @ H.T)) * w[None, :]
    Sinv = 0.5 * (Sinv + Sinv.T)
    S = (H * d[None, :]) @ H.T + np.diag(r)
    v = mn = None
    if m is not None:
        v = y - H @ m
        mn = m + K @ v
    return MeasurementUpdate(mn, Pn, K, S, Sinv, IKH, v)


def innovation_terms(u, d, H, r, m):
    r"""Return :math:`(\log|S|, v^\top S^{-1}v)` of an :func:`information_update`.

    Both without forming :math:`S` (see the Notes of :func:`information_update`): the
    determinant lemma with the Cholesky factor of :math:`J = P^{+\,-1}`, and the sum of
    squares of the posterior residuals of the readings and of the prior.
    """
    logdet = (float(np.sum(np.log(r))) + float(np.sum(np.log(d)))
              - float(np.linalg.slogdet(u.P)[1]))
    e = u.v - H @ (u.m - m)
    dm = u.m - m
    return logdet, float(e @ (e / r) + dm @ (dm / d))


def is_diagonal(P):
    """Whether every off-diagonal entry of ``P`` is an exact zero."""
    return not np.any(P[~np.eye(len(P), dtype=bool)])


def _riccati_fixed_point(f, Ho, q, ro, max_iter=100):
    r"""Steady-state predicted covariance of a key (pattern, step) by structured doubling.

    Solves :math:`X = F X (I + GX)^{-1} F^\top + Q`, :math:`G = H_o^\top R_{oo}^{-1} H_o` (the
    filter Riccati equation) with the doubling iteration of Chu, Fan & Lin (2005),
    which converges quadratically; two plain Riccati steps then polish the result.
    """
    p = len(f)
    Ieye = np.eye(p)
    A = np.diag(f)
    Gm = (Ho.T / ro) @ Ho
    X = np.diag(q)
    for _ in range(max_iter):
        W = np.linalg.inv(Ieye + Gm @ X)
        A, Gm, Xn = A @ W @ A, Gm + A @ W @ Gm @ A.T, X + A.T @ X @ W @ A
        done = np.max(np.abs(Xn - X)) <= 1e-15 * np.max(np.abs(Xn))
        X = 0.5 * (Xn + Xn.T)
        if done:
            break
    for _ in range(2):
        Pf = measurement_update(X, Ho, ro).P
        X = f[:, None] * Pf * f[None, :] + np.diag(q)
        X = 0.5 * (X + X.T)
    return X


def _fixed_state(fixed, key, f, qd, Ho, ro, idx, next_id, seg):
    """Return the frozen record of a key's steady state (fixed point cached per key)."""
    if key not in fixed:
        if len(fixed) > 256:
            fixed.pop(next(iter(fixed)))
        fixed[key] = _riccati_fixed_point(f, Ho, qd, ro)
    Pp = fixed[key]
    u = measurement_update(Pp, Ho, ro)
    fid, pid = next_id, next_id + 1
    seg.P_table[fid] = u.P
    seg.pred_table[pid] = (f, Pp)
    return {"key": key, "f": f, "Pp": Pp, "P": u.P, "idx": idx, "fid": fid, "pid": pid,
            "K": u.K, "Phi": u.IKH * f[None, :], "HF": Ho * f[None, :], "Sinv": u.Sinv,
            "logdet": float(np.linalg.slogdet(u.S)[1])}


def _frozen_run(fz, Y, k, e, m, seg):
    """Filter frames ``k:e`` in the frozen steady state ``fz`` at once; returns ``(m, P)``.

    Writes the means, covariance keys, NIS and log-likelihood of those frames into ``seg``.
    """
    seg.P_table[fz["fid"]] = fz["P"]
    seg.pred_table[fz["pid"]] = (fz["f"], fz["Pp"])
    idx = fz["idx"]
    Yo = Y[k:e][:, idx]
    if idx.size:
        Mr = linear_recursion(fz["Phi"], Yo, m, B=fz["K"])
        Mprev = np.vstack([m[None, :], Mr[:-1]])
        V = Yo - Mprev @ fz["HF"].T
        q = np.einsum("ij,ij->i", V @ fz["Sinv"], V)
        seg.nis[k:e] = q
        seg.loglik[k:e] = -0.5 * (q + fz["logdet"] + idx.size * _LOG2PI)
    else:
        f = fz["f"]
        Mr = m[None, :] * np.cumprod(np.tile(f, (e - k, 1)), axis=0)
    seg.m[k:e] = Mr
    seg.fid[k:e], seg.pid[k:e] = fz["fid"], fz["pid"]
    return Mr[-1].copy(), fz["P"]


def _exact_step(model, seg, k, dt, m, P, y, obs, next_id, diagonal=False):
    """One exact prediction and measurement update of frame ``k``; returns ``(m, P, step)``.

    ``diagonal``: the covariance is still the diagonal prior (no reading yet), so the update
    is done in information form (:func:`information_update`).

    The predicted and filtered covariances are stored in ``seg`` under the keys ``next_id``
    and ``next_id + 1``; ``step`` holds what the steady-state detection needs.
    """
    f, qd = model.transition(dt)
    mp = f * m
    Pp = f[:, None] * P * f[None, :] + np.diag(qd)
    idx = np.flatnonzero(obs)
    seg.pred_table[next_id] = (f, Pp)
    seg.pid[k] = next_id
    step = {"f": f, "qd": qd, "Pp": Pp, "idx": idx, "K": None}
    if idx.size:
        Ho = model.H[idx]
        ro = model.noise_var[idx]
        if diagonal:
            # first update from the diagonal prior: information form (no cancellation)
            d = np.diag(Pp).copy()
            u = information_update(d, Ho, ro, m=mp, y=y[idx])
            logdet, q = innovation_terms(u, d, Ho, ro, mp)
        else:
            u = measurement_update(Pp, Ho, ro, m=mp, y=y[idx])
            # numpy's LAPACK calls: scipy's triangular solves were far slower at this size
            logdet = 2.0 * np.sum(np.log(np.diag(np.linalg.cholesky(u.S))))
            q = float(u.v @ u.Sinv @ u.v)
        m, P = u.m, u.P
        seg.nis[k] = q
        seg.loglik[k] = -0.5 * (q + logdet + idx.size * _LOG2PI)
        step.update(K=u.K, IKH=u.IKH, Sinv=u.Sinv, logdet=logdet, Ho=Ho, ro=ro)
    else:
        m, P = mp, Pp
    seg.m[k] = m
    seg.P_table[next_id + 1] = P
    seg.fid[k] = next_id + 1
    return m, P, step


def filter_segment(model, state, t, Y, *, steady_tol=1e-10, max_transient=None):
    r"""Run the Kalman filter over one segment of frames.

    Parameters
    ----------
    model : CoefficientDynamics
    state : FilterState
        State after the previous segment (``FilterState.initial(model)`` at the start).
    t : ndarray of shape (L,)
        Strictly increasing frame times (after the previous segment's last time).
    Y : ndarray of shape (L, n_sensors)
        Readings; NaN marks a missing reading.
    steady_tol : float, default=1e-10
        Relative change of gain and covariance below which they are frozen while the drop-out
        pattern and time step stay the same; 0 disables the steady-state shortcut.
    max_transient : int, optional
        After this many exact steps with the same key, switch to the key's steady state
        (the fixed point of the Riccati recursion) even if the recursion has not converged
        yet. Directions that the current sensors do not see relax towards the prior only at
        the rate :math:`e^{-2\Delta/T}`, which can take thousands of frames; this option
        trades that slow tail for speed (an approximation; None keeps every step exact to
        ``steady_tol``).

    Returns
    -------
    state : FilterState
        The state after the last frame (a new object; the input is not changed).
    segment : FilterSegment
    """
    t = np.asarray(t, float)
    Y = np.asarray(Y, float)
    L, p = len(t), model.n_coef
    obs = np.isfinite(Y)
    dts = np.diff(t, prepend=state.t)
    pattern = np.packbits(obs, axis=1)
    same_next = np.zeros(L, bool)  # frame k has the same key as frame k-1
    if L > 1:
        same_next[1:] = (dts[1:] == dts[:-1]) & (pattern[1:] == pattern[:-1]).all(axis=1)
    keys = [None] * L

    def key_of(k):
        if keys[k] is None:
            keys[k] = (float(dts[k]), pattern[k].tobytes())
        return keys[k]

    M = np.empty((L, p))
    fid = np.empty(L, np.int64)
    pid = np.empty(L, np.int64)
    ll = np.zeros(L)
    nis = np.zeros(L)
    seg = FilterSegment(t, M, fid, pid, {}, {}, ll, nis, obs.sum(axis=1))
    next_id = state.next_id
    m, P = state.m.copy(), state.P.copy()
    frozen = dict(state.frozen) if state.frozen is not None else None
    prev, last_key = state.prev, state.key
    fixed = dict(state.fixed)
    diagonal = is_diagonal(P)  # until the first reading the covariance stays diagonal
    k = 0
    while k < L:
        same = same_next[k] if k > 0 else (last_key is not None and key_of(0) == last_key)
        if frozen is not None and same:
            # steady state: the whole run of frames with this key at once
            e = k + 1
            while e < L and same_next[e]:
                e += 1
            m, P = _frozen_run(frozen, Y, k, e, m, seg)
            k = e
            continue
        # full step
        key = key_of(k)
        m, P, st = _exact_step(model, seg, k, dts[k], m, P, Y[k], obs[k], next_id, diagonal)
        diagonal = diagonal and not st["idx"].size
        next_id += 2
        f, Pp, idx, K = st["f"], st["Pp"], st["idx"], st["K"]
        # steady-state detection: same key as the previous frame and nothing moved
        frozen = None
        if (steady_tol > 0 and prev is not None and prev["key"] == key
                and close_relative(P, prev["P"], steady_tol)
                and (K is None or close_relative(K, prev["K"], steady_tol))):
            fz = {"key": key, "f": f, "Pp": Pp, "P": P, "idx": idx,
                  "fid": fid[k], "pid": pid[k]}
            if idx.size:
                fz.update(K=K, Phi=st["IKH"] * f[None, :], HF=st["Ho"] * f[None, :],
                          Sinv=st["Sinv"], logdet=st["logdet"])
            frozen = fz
        run = prev["run"] + 1 if prev is not None and prev["key"] == key else 1
        if (frozen is None and steady_tol > 0 and max_transient and run >= max_transient
                and idx.size):
            frozen = _fixed_state(fixed, key, f, st["qd"], st["Ho"], st["ro"], idx, next_id,
                                  seg)
            next_id += 2
        prev = {"key": key, "P": P, "K": K, "run": run}
        last_key = key
        k += 1
    if L:
        last_key = key_of(L - 1)
    new = FilterState(m, P, float(t[-1]) if L else state.t, last_key, frozen, prev,
                      state.loglik + float(ll.sum()), state.n_frames + L, next_id, fixed)
    return new, seg


def log_likelihood(model, t, Y, *, steady_tol=1e-10, segment=65536):
    """Log-likelihood of the readings under ``model`` (prediction-error decomposition)."""
    state = FilterState.initial(model)
    for a in range(0, len(t), segment):
        state, _ = filter_segment(model, state, t[a:a + segment], Y[a:a + segment],
                                  steady_tol=steady_tol)
    return state.loglik


def exact_loglik(model, t, Y, *, steady_tol=0.0, use_kernel=True):
    """Exact log-likelihood of the readings, by the compiled kernel when it can run.

    ``kernel.filter_loglik`` (numba, sequential scalar updates, exact) when numba imports and
    the kernel accepts the model; otherwise :func:`log_likelihood` with ``steady_tol``.
    """
    if use_kernel:
        try:
            from .kernel import KernelModel, filter_loglik

            km = KernelModel.from_dynamics(model)
        except (ImportError, ValueError):
            pass
        else:
            return filter_loglik(km, t, Y)
    return log_likelihood(model, t, Y, steady_tol=steady_tol)


def fit_time_scale(model, t, Y, *, bounds=None, steady_tol=None, use_kernel=True):
    r"""Maximum-likelihood time scale :math:`T` of the dynamics.

    Maximises the prediction-error log-likelihood over :math:`\log T` (grid, then bounded
    Brent search: :func:`~invert.stages._search.grid_then_refine`).

    Parameters
    ----------
    model : CoefficientDynamics
    t, Y : frame times and readings (as in :func:`filter_segment`).
    bounds : (float, float), optional
        Search range for ``T``; default from 0.5 to 1e6 times the median time step.
    steady_tol : float, optional
        Used only by the NumPy fallback (:func:`log_likelihood`); None means 0 there (the
        exact recursion). The compiled kernel is exact at every frame and needs none, so the
        likelihood is exact whenever the kernel runs, whatever ``steady_tol``.
    use_kernel : bool, default=True
        Evaluate the likelihood with the compiled exact kernel
        (:func:`~invert.stages.assimilate.kernel.filter_loglik`) when numba is installed and
        the kernel accepts the model; False forces the NumPy recursion.

    Returns
    -------
    time_scale : float
    loglik : float
        Log-likelihood at the optimum.
    """
    t = np.asarray(t, float)
    Y = np.asarray(Y, float)
    if bounds is None:
        step = float(np.median(np.diff(t))) if len(t) > 1 else 1.0
        bounds = (0.5 * step, 1e6 * step)
    lo, hi = np.log(bounds[0]), np.log(bounds[1])
    tol = 0.0 if steady_tol is None else float(steady_tol)

    def nll(logT):
        return -exact_loglik(model.with_time_scale(np.exp(logT)), t, Y, steady_tol=tol,
                             use_kernel=use_kernel)

    x, fx = grid_then_refine(nll, np.linspace(lo, hi, 9), xatol=1e-3)
    return float(np.exp(x)), float(-fx)
