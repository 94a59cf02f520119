r"""Data assimilation over time: Kalman filter and Rauch–Tung–Striebel smoother of the coefficients.

Pure NumPy/SciPy. The batch driver (:mod:`invert.batch.runner`) feeds logged frames through
:func:`filter_segment` and :func:`smooth_segment` a segment at a time, so memory stays bounded
however long the log is; :class:`KalmanSmoother` wraps both passes for arrays held in memory.

Notes
-----
State: the coefficient vector :math:`c_k` at frame time :math:`t_k`. Readings
:math:`y_k = H c_k + e_k`, :math:`e_k \sim N(0, R)`, :math:`R = \operatorname{diag}(r_i)`; a
missing reading drops its row (a frame with none skips the update).

Dynamics over a step :math:`\Delta_k = t_k - t_{k-1}`, per coefficient :math:`j` with prior
(stationary) variance :math:`v_j = \tau^2(1+\lambda_{n_j})^{-s}` and time scale :math:`T`:

.. math::
   c_{k,j} = f_j c_{k-1,j} + w_{k,j},\quad f_j = e^{-\Delta_k/T},\quad
   \operatorname{Var} w_{k,j} = v_j\,(1 - e^{-2\Delta_k/T})

(an Ornstein–Uhlenbeck process per harmonic whose stationary law is the smoothness prior, so
the process noise depends on degree through the prior shape and grows with the time step). The
mean level :math:`a_0` follows a random walk, :math:`f = 1`, :math:`\operatorname{Var} w =
2\tau^2\Delta_k/T` (the short-time diffusion of a degree-0 harmonic). Irregular steps and gaps
in time only change :math:`f` and :math:`Q`.

Filter (Särkkä 2013, Thm 4.2): :math:`m^- = Fm`, :math:`P^- = FPF^\top + Q`,
:math:`v = y_o - H_o m^-`, :math:`S = H_o P^- H_o^\top + R_{oo}`, :math:`K = P^-H_o^\top
S^{-1}`, :math:`m = m^- + Kv`, :math:`P = (I-KH_o)P^-(I-KH_o)^\top + KR_{oo}K^\top` (Joseph
form). Log-likelihood by the prediction-error decomposition,
:math:`\sum_k \log N(v_k \mid 0, S_k)`; the time scale :math:`T` is chosen by maximising it.

Smoother (Rauch, Tung & Striebel 1965; Särkkä 2013, Thm 8.2): :math:`G_k = P_kF_{k+1}^\top
(P^-_{k+1})^{-1}`, :math:`m^s_k = m_k + G_k(m^s_{k+1} - m^-_{k+1})`, :math:`P^s_k = P_k +
G_k(P^s_{k+1} - P^-_{k+1})G_k^\top`.

Steady state: while the drop-out pattern and the time step stay the same the Riccati recursion
converges; once the gain and covariance change by less than ``steady_tol`` (relative) from one
frame to the next they are frozen for the rest of the run, and the means follow the linear
recursion :math:`m_k = \Phi m_{k-1} + K y_k`, :math:`\Phi = (I - KH_o)F`, evaluated for the whole
run at once (in the eigenbasis of :math:`\Phi` with :func:`scipy.signal.lfilter`). The same
holds backwards for the smoother. ``steady_tol=0`` gives the exact recursions at every frame.

References
----------
.. [1] H. E. Rauch, F. Tung and C. T. Striebel, "Maximum likelihood estimates of linear dynamic
       systems", AIAA Journal 3:1445–1450, 1965. doi:10.2514/3.3166
.. [2] S. Särkkä, *Bayesian Filtering and Smoothing*, Cambridge University Press, 2013,
       Thm 4.2 and Thm 8.2. doi:10.1017/CBO9781139344203
.. [3] A. C. Harvey, *Forecasting, Structural Time Series Models and the Kalman Filter*,
       Cambridge University Press, 1989 (prediction-error decomposition).
.. [4] S. Särkkä and Á. F. García-Fernández, "Temporal parallelization of Bayesian smoothers",
       IEEE Trans. Automatic Control 66:299–306, 2021. doi:10.1109/TAC.2020.2976316
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy import signal

from .._search import grid_then_refine

__all__ = [
    "CoefficientDynamics",
    "FilterState",
    "KalmanSmoother",
    "SmoothedSeries",
    "SmootherState",
    "filter_segment",
    "fit_time_scale",
    "log_likelihood",
    "run_smoother",
    "smooth_segment",
]

_LOG2PI = float(np.log(2 * np.pi))


@dataclass(frozen=True)
class CoefficientDynamics:
    r"""The linear-Gaussian state-space model of the coefficients over time.

    Parameters
    ----------
    H : ndarray of shape (n_sensors, n_coef)
        Design matrix of all sensors (rows drop out when a reading is missing).
    noise_var : ndarray of shape (n_sensors,)
        Noise variance :math:`r_i` of each sensor's reading.
    prior_var : ndarray of shape (n_coef,)
        Prior (stationary) variance :math:`v_j` of each coefficient; the random-walk columns
        use it only as the initial variance.
    drift_var : ndarray of shape (n_coef,)
        Variance that sets the process noise: :math:`v_j` for the OU columns, :math:`\tau^2` for
        the random-walk columns.
    random_walk : ndarray of bool, shape (n_coef,)
        Columns following a random walk (the mean level).
    time_scale : float
        Time scale :math:`T` of the dynamics, in the unit of the frame times.
    """

    H: np.ndarray
    noise_var: np.ndarray
    prior_var: np.ndarray
    drift_var: np.ndarray
    random_walk: np.ndarray
    time_scale: float

    def __post_init__(self):
        if not (np.isfinite(self.time_scale) and self.time_scale > 0):
            raise ValueError(f"The 'time_scale' parameter of CoefficientDynamics must be a "
                             f"float > 0. Got {self.time_scale!r} instead.")

    @classmethod
    def from_prior(cls, H, noise_var, shape, degrees, *, tau2, time_scale, mean_var=None):
        """Dynamics whose stationary law is the smoothness prior ``tau2 * shape``.

        Parameters
        ----------
        H, noise_var : see the class.
        shape : ndarray of shape (n_coef,)
            Prior variance pattern with ``tau = 1`` (:meth:`SmoothnessPrior.shape`).
        degrees : ndarray of int, shape (n_coef,)
        tau2 : float
            Prior scale :math:`\\tau^2`.
        time_scale : float
        mean_var : float, optional
            Initial variance of the mean level; default ``tau2 * shape`` at degree 0.
        """
        degrees = np.asarray(degrees)
        rw = degrees == 0
        prior = tau2 * np.asarray(shape, float)
        if mean_var is not None:
            prior = np.where(rw, mean_var, prior)
        # degree-0 drift uses the degree-0 smoothness weight (1 + 0)^(-s) = 1, i.e. tau^2
        drift = np.where(rw, tau2, prior)
        return cls(np.asarray(H, float), np.asarray(noise_var, float), prior, drift, rw,
                   float(time_scale))

    @property
    def n_coef(self) -> int:
        """Number of coefficients (state dimension)."""
        return self.H.shape[1]

    def transition(self, dt):
        """Diagonals of :math:`F` and :math:`Q` for a step ``dt`` (``dt = nan``: no step)."""
        if not np.isfinite(dt):
            return np.ones(self.n_coef), np.zeros(self.n_coef)
        T = self.time_scale
        e = np.exp(-dt / T)
        f = np.where(self.random_walk, 1.0, e)
        q = np.where(self.random_walk, self.drift_var * 2.0 * dt / T,
                     self.drift_var * -np.expm1(-2.0 * dt / T))
        return f, q

    def with_time_scale(self, time_scale):
        """The same model with another time scale."""
        return replace(self, time_scale=float(time_scale))


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
        """The prior at the first frame: mean zero, covariance ``diag(prior_var)``."""
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
    r"""The Kalman measurement update of a Gaussian state by readings :math:`y = Hx + e`.

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
        Posterior covariance in Joseph form, :math:`(I-KH)P(I-KH)^	op + KRK^	op` (stays
        positive semi-definite under rounding); else :math:`(I-KH)P`.

    Returns
    -------
    MeasurementUpdate

    Notes
    -----
    :math:`S = HPH^	op + R`, :math:`K = PH^	op S^{-1}`, :math:`v = y - Hm`,
    :math:`m^+ = m + Kv` (Särkkä 2013, Thm 4.2; Joseph form: Bucy & Joseph 1968). ``S^{-1}``
    and the covariance are symmetrised, :math:`	frac12(X + X^	op)`.
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


def _linear_recursion(Phi, U, x0, *, reverse=False, B=None):
    r"""Evaluate :math:`x_k = \Phi x_{k-1} + u_k` for all rows of ``U`` starting from ``x0``.

    With ``B`` the inputs are :math:`u_k = B\,U_k` (``U`` holds the raw rows). Uses the
    eigenbasis of :math:`\Phi` and a first-order recursive filter per component
    (:func:`scipy.signal.lfilter`) when the eigenvalues are real and the eigenvectors well
    conditioned, else a plain loop. With ``reverse`` the recursion runs from the last row to
    the first.
    """
    L = U.shape[0]
    if reverse:
        return _linear_recursion(Phi, U[::-1], x0, B=B)[::-1]
    if L == 0:
        return np.empty((0, Phi.shape[0]))
    if L > 64:
        lam, V = np.linalg.eig(Phi)
        if np.all(np.abs(lam.imag) <= 1e-12 * (1 + np.abs(lam.real))):
            lam, V = lam.real, V.real
            Vi = None
            try:
                if np.linalg.cond(V) < 1e6:
                    Vi = np.linalg.inv(V)
            except np.linalg.LinAlgError:
                Vi = None
            if Vi is not None:
                W = (Vi if B is None else Vi @ B) @ U.T  # (p, L) inputs in the eigenbasis
                z0 = Vi @ x0
                for i in range(W.shape[0]):
                    W[i] = signal.lfilter([1.0], [1.0, -lam[i]], W[i], zi=[lam[i] * z0[i]])[0]
                return (V @ W).T
    if B is not None:
        U = U @ B.T
    X = np.empty_like(U)
    x = np.asarray(x0, float)
    for k in range(L):
        x = Phi @ x + U[k]
        X[k] = x
    return X


def _close(a, b, tol):
    return np.max(np.abs(a - b)) <= tol * max(np.max(np.abs(a)), 1e-300)


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
    """The frozen record of a key's steady state (fixed point cached per key)."""
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
    k = 0
    while k < L:
        same = same_next[k] if k > 0 else (last_key is not None and key_of(0) == last_key)
        if frozen is not None and same:
            # steady state: the whole run of frames with this key at once
            e = k + 1
            while e < L and same_next[e]:
                e += 1
            fz = frozen
            seg.P_table[fz["fid"]] = fz["P"]
            seg.pred_table[fz["pid"]] = (fz["f"], fz["Pp"])
            idx = fz["idx"]
            Yo = Y[k:e][:, idx]
            if idx.size:
                Mr = _linear_recursion(fz["Phi"], Yo, m, B=fz["K"])
                Mprev = np.vstack([m[None, :], Mr[:-1]])
                V = Yo - Mprev @ fz["HF"].T
                q = np.einsum("ij,ij->i", V @ fz["Sinv"], V)
                nis[k:e] = q
                ll[k:e] = -0.5 * (q + fz["logdet"] + idx.size * _LOG2PI)
            else:
                f = fz["f"]
                Mr = m[None, :] * np.cumprod(np.tile(f, (e - k, 1)), axis=0)
            M[k:e] = Mr
            m = Mr[-1].copy()
            P = fz["P"]
            fid[k:e], pid[k:e] = fz["fid"], fz["pid"]
            k = e
            continue
        # full step
        key = key_of(k)
        f, qd = model.transition(dts[k])
        mp = f * m
        Pp = f[:, None] * P * f[None, :] + np.diag(qd)
        idx = np.flatnonzero(obs[k])
        seg.pred_table[next_id] = (f, Pp)
        pid[k] = next_id
        next_id += 1
        K = None
        if idx.size:
            Ho = model.H[idx]
            ro = model.noise_var[idx]
            u = measurement_update(Pp, Ho, ro, m=mp, y=Y[k, idx])
            m, P, K, Sinv = u.m, u.P, u.K, u.Sinv
            # numpy's LAPACK calls: scipy's triangular solves were far slower at this size
            logdet = 2.0 * np.sum(np.log(np.diag(np.linalg.cholesky(u.S))))
            q = float(u.v @ Sinv @ u.v)
            nis[k] = q
            ll[k] = -0.5 * (q + logdet + idx.size * _LOG2PI)
        else:
            m, P = mp, Pp
        M[k] = m
        seg.P_table[next_id] = P
        fid[k] = next_id
        next_id += 1
        # steady-state detection: same key as the previous frame and nothing moved
        frozen = None
        if (steady_tol > 0 and prev is not None and prev["key"] == key
                and _close(P, prev["P"], steady_tol)
                and (K is None or _close(K, prev["K"], steady_tol))):
            fz = {"key": key, "f": f, "Pp": Pp, "P": P, "idx": idx,
                  "fid": fid[k], "pid": pid[k]}
            if idx.size:
                fz.update(K=K, Phi=u.IKH * f[None, :], HF=Ho * f[None, :], Sinv=Sinv,
                          logdet=logdet)
            frozen = fz
        run = prev["run"] + 1 if prev is not None and prev["key"] == key else 1
        if (frozen is None and steady_tol > 0 and max_transient and run >= max_transient
                and idx.size):
            frozen = _fixed_state(fixed, key, f, qd, Ho, ro, idx, next_id, seg)
            next_id += 2
        prev = {"key": key, "P": P, "K": K, "run": run}
        last_key = key
        k += 1
    if L:
        last_key = key_of(L - 1)
    new = FilterState(m, P, float(t[-1]) if L else state.t, last_key, frozen, prev,
                      state.loglik + float(ll.sum()), state.n_frames + L, next_id, fixed)
    return new, seg


@dataclass
class SmootherState:
    """What the smoother carries backwards from a later segment to an earlier one."""

    ms: np.ndarray | None = None      # smoothed mean of the next frame
    Ps: np.ndarray | None = None      # smoothed covariance of the next frame
    pred: tuple | None = None         # (key, f, P^-) that led to the next frame
    last: tuple | None = None         # (filtered key, predicted key) of the step just done
    frozen: dict | None = None
    run: int = 0                      # consecutive exact steps with the same pair


def smooth_segment(seg, state, *, steady_tol=1e-10, max_transient=None):
    """Run the RTS smoother backwards over one filtered segment.

    Parameters
    ----------
    seg : FilterSegment
    state : SmootherState
        From the later segment (``SmootherState()`` for the last segment of the log).
    steady_tol : float
        As in :func:`filter_segment`.
    max_transient : int, optional
        As in :func:`filter_segment`: after this many exact backward steps with the same gain,
        jump to the fixed point of :math:`X = P + G(X - P^-)G^\top` (a discrete Lyapunov
        equation, :func:`scipy.linalg.solve_discrete_lyapunov`).

    Returns
    -------
    state : SmootherState
        To pass to the previous segment.
    ms : ndarray of shape (L, p)
        Smoothed means.
    sid : ndarray of shape (L,)
        Index into ``Ps_table`` for each frame.
    Ps_table : list of ndarray
        Smoothed covariances.
    """
    L = len(seg.t)
    p = seg.m.shape[1]
    ms_out = np.empty((L, p))
    sid = np.empty(L, np.int64)
    Ps_table = []
    ms_next, Ps_next, pred_in = state.ms, state.Ps, state.pred
    frozen, last, run = state.frozen, state.last, state.run
    # pair(j) = (key of P_j, key of P^-_{j+1}); run_start[j] is the first frame of the run of
    # frames sharing frame j's pair (inside the segment; the last frame links to the next one)
    nxt = np.empty(L, np.int64)
    if L:
        nxt[:-1] = seg.pid[1:]
        nxt[-1] = pred_in[0] if pred_in is not None else -1
    same = np.zeros(L, bool)
    if L > 1:
        same[1:] = (seg.fid[1:] == seg.fid[:-1]) & (nxt[1:] == nxt[:-1])
    run_start = np.maximum.accumulate(np.where(same, 0, np.arange(L))) if L else same
    I = np.eye(p)
    k = L - 1
    while k >= 0:
        if k == L - 1 and pred_in is None:  # last frame of the log: filter = smoother
            ms, Ps = seg.m[k].copy(), seg.P_table[seg.fid[k]]
            Ps_table.append(Ps)
            sid[k] = len(Ps_table) - 1
            ms_out[k] = ms
            ms_next, Ps_next, last, frozen = ms, Ps, None, None
            pred_in = (seg.pid[k],) + tuple(seg.pred_table[seg.pid[k]])
            k -= 1
            continue
        key = (int(seg.fid[k]), int(nxt[k]))
        P = seg.P_table[key[0]]
        f, Pp = seg.pred_table[key[1]] if k + 1 < L else pred_in[1:]
        if frozen is not None and frozen["key"] == key:
            # steady state: m^s_j = (I - G F) m_j + G m^s_{j+1} over the whole run
            b = int(run_start[k])
            rows = slice(b, k + 1)
            Xr = _linear_recursion(frozen["G"], seg.m[rows], ms_next, reverse=True,
                                   B=frozen["IGF"])
            ms_out[rows] = Xr
            if frozen.get("sid") is None:
                Ps_table.append(frozen["Ps"])
                frozen["sid"] = len(Ps_table) - 1
            sid[rows] = frozen["sid"]
            ms_next, Ps_next = Xr[0].copy(), frozen["Ps"]
            last, run = key, 0
            k = b - 1
            continue
        # G = P F (P^-)^{-1}, from the symmetric solve (P^-) G^T = F P
        G = np.linalg.solve(Pp, f[:, None] * P).T
        ms = seg.m[k] + G @ (ms_next - f * seg.m[k])
        Ps = P + G @ (Ps_next - Pp) @ G.T
        Ps = 0.5 * (Ps + Ps.T)
        new_frozen = None
        run = run + 1 if last == key else 1
        if steady_tol > 0 and last == key and _close(Ps, Ps_next, steady_tol):
            new_frozen = {"key": key, "G": G, "IGF": I - G * f[None, :], "Ps": Ps, "sid": None}
        elif steady_tol > 0 and max_transient and run >= max_transient:
            from scipy.linalg import solve_discrete_lyapunov

            X = solve_discrete_lyapunov(G, P - G @ Pp @ G.T)
            new_frozen = {"key": key, "G": G, "IGF": I - G * f[None, :], "Ps": 0.5 * (X + X.T),
                          "sid": None}
        Ps_table.append(Ps)
        sid[k] = len(Ps_table) - 1
        ms_out[k] = ms
        ms_next, Ps_next = ms, Ps
        frozen, last = new_frozen, key
        k -= 1
    if L:
        pred_in = (int(seg.pid[0]),) + tuple(seg.pred_table[seg.pid[0]])
    if frozen is not None:
        frozen = dict(frozen, sid=None)
    return SmootherState(ms_next, Ps_next, pred_in, last, frozen, run), ms_out, sid, Ps_table


def log_likelihood(model, t, Y, *, steady_tol=1e-10, segment=65536):
    """Log-likelihood of the readings under ``model`` (prediction-error decomposition)."""
    state = FilterState.initial(model)
    for a in range(0, len(t), segment):
        state, _ = filter_segment(model, state, t[a:a + segment], Y[a:a + segment],
                                  steady_tol=steady_tol)
    return state.loglik


def fit_time_scale(model, t, Y, *, bounds=None, steady_tol=1e-10):
    r"""Maximum-likelihood time scale :math:`T` of the dynamics.

    Maximises the prediction-error log-likelihood over :math:`\log T` (bounded Brent search).

    Parameters
    ----------
    model : CoefficientDynamics
    t, Y : frame times and readings (as in :func:`filter_segment`).
    bounds : (float, float), optional
        Search range for ``T``; default from 0.5 to 1e6 times the median time step.

    Returns
    -------
    time_scale : float
    loglik : float
        Log-likelihood at the optimum.
    """
    t = np.asarray(t, float)
    if bounds is None:
        step = float(np.median(np.diff(t))) if len(t) > 1 else 1.0
        bounds = (0.5 * step, 1e6 * step)
    lo, hi = np.log(bounds[0]), np.log(bounds[1])

    def nll(logT):
        return -log_likelihood(model.with_time_scale(np.exp(logT)), t, Y,
                               steady_tol=steady_tol)

    x, fx = grid_then_refine(nll, np.linspace(lo, hi, 9), xatol=1e-3)
    return float(np.exp(x)), float(-fx)


@dataclass(frozen=True)
class SmoothedSeries:
    """Smoothed coefficient means and covariances for every frame.

    Attributes
    ----------
    t : ndarray of shape (n_frames,)
    mean : ndarray of shape (n_frames, n_coef)
    cov_index : ndarray of int, shape (n_frames,)
        Index into ``cov_table`` (frames in a steady-state run share one covariance).
    cov_table : list of ndarray of shape (n_coef, n_coef)
    loglik : float
        Filter log-likelihood of all readings.
    time_scale : float
    """

    t: np.ndarray
    mean: np.ndarray
    cov_index: np.ndarray
    cov_table: list
    loglik: float
    time_scale: float

    def cov(self, k):
        """Smoothed covariance of frame ``k``."""
        return self.cov_table[self.cov_index[k]]

    def at(self, H):
        """Mean and sd of ``H c`` at every frame, arrays of shape (n_frames, n_points)."""
        H = np.atleast_2d(H)
        var = np.array([np.einsum("ij,jk,ik->i", H, C, H) for C in self.cov_table])
        return self.mean @ H.T, np.sqrt(np.clip(var[self.cov_index], 0, None))

    def estimate(self, k, domain=None, *, noise_sd=None):
        """The :class:`~invert.problem.Estimate` of frame ``k``."""
        from ...problem import Estimate

        return Estimate(mean=self.mean[k], cov=self.cov(k), domain=domain,
                        method="kalman-smoother", noise_sd=noise_sd,
                        info={"time_scale": self.time_scale, "loglik": self.loglik})


def run_smoother(model, t, Y, *, steady_tol=1e-10, segment=65536, max_transient=None):
    """Filter forwards and smooth backwards over arrays in memory.

    Returns
    -------
    SmoothedSeries
    """
    t = np.asarray(t, float)
    Y = np.asarray(Y, float)
    state = FilterState.initial(model)
    segs = []
    for a in range(0, len(t), segment):
        state, seg = filter_segment(model, state, t[a:a + segment], Y[a:a + segment],
                                    steady_tol=steady_tol, max_transient=max_transient)
        segs.append(seg)
    back = SmootherState()
    means, idx, table = [None] * len(segs), [None] * len(segs), []
    for i in range(len(segs) - 1, -1, -1):
        back, ms, sid, tab = smooth_segment(segs[i], back, steady_tol=steady_tol,
                                            max_transient=max_transient)
        means[i], idx[i] = ms, sid + len(table)
        table.extend(tab)
    return SmoothedSeries(t, np.vstack(means) if means else np.empty((0, model.n_coef)),
                          np.concatenate(idx) if idx else np.empty(0, int), table,
                          state.loglik, model.time_scale)


class KalmanSmoother:
    """Kalman filter + RTS smoother of the coefficients, time scale by maximum likelihood.

    Parameters
    ----------
    time_scale : float, optional
        Fix the time scale :math:`T`; by default it is estimated by maximum likelihood on the
        first ``ml_frames`` frames.
    steady_tol : float, default=1e-10
        See :func:`filter_segment`.
    max_transient : int, optional
        See :func:`filter_segment` (None: exact to ``steady_tol``).
    ml_frames : int, default=20000
        Frames used for the likelihood search.
    bounds : (float, float), optional
        Search range for ``T``.

    Attributes
    ----------
    time_scale_ : float
    loglik_ : float
    """

    def __init__(self, time_scale=None, *, steady_tol=1e-10, max_transient=None,
                 ml_frames=20000, bounds=None):
        self.time_scale = time_scale
        self.steady_tol = steady_tol
        self.max_transient = max_transient
        self.ml_frames = ml_frames
        self.bounds = bounds

    def fit(self, model, t, Y) -> SmoothedSeries:
        """Estimate the time scale (unless fixed), then filter and smooth all frames."""
        if self.time_scale is None:
            T, _ = fit_time_scale(model, t[: self.ml_frames], Y[: self.ml_frames],
                                  bounds=self.bounds, steady_tol=self.steady_tol)
        else:
            T = float(self.time_scale)
        self.time_scale_ = T
        out = run_smoother(model.with_time_scale(T), t, Y, steady_tol=self.steady_tol,
                           max_transient=self.max_transient)
        self.loglik_ = out.loglik
        return out


# --- parallel-in-time elements (Särkkä & García-Fernández 2021) --------------------------------
def _combine_filter(ei, ej):
    """Associative combination of filtering elements ``ei`` (earlier) and ``ej`` (later)."""
    Ai, bi, Ci, etai, Ji = ei
    Aj, bj, Cj, etaj, Jj = ej
    p = len(bi)
    I = np.eye(p)
    M = np.linalg.inv(I + Ci @ Jj)
    AjM = Aj @ M
    A = AjM @ Ai
    b = AjM @ (bi + Ci @ etaj) + bj
    C = AjM @ Ci @ Aj.T + Cj
    N = np.linalg.inv(I + Jj @ Ci)
    AiN = Ai.T @ N
    eta = AiN @ (etaj - Jj @ bi) + etai
    J = AiN @ Jj @ Ai + Ji
    return A, b, 0.5 * (C + C.T), eta, 0.5 * (J + J.T)


def filter_summary(model, t, Y, *, t_prev=np.nan, first=False):
    r"""The filtering element of a run of frames: the whole run as one associative element.

    Parameters
    ----------
    model : CoefficientDynamics
    t, Y : frame times and readings of the run.
    t_prev : float
        Time of the frame before the run (NaN for the first frame of the log).
    first : bool
        The run starts the log (its first element absorbs the prior).

    Returns
    -------
    tuple (A, b, C, eta, J)
        Element of Särkkä & García-Fernández (2021, Lemmas 7-8): the run maps the filtered
        state before it, :math:`x`, to :math:`N(Ax + b, C)` after it, with the run's data
        likelihood :math:`\propto N_I(x;\eta, J)`. Combining these exactly (in order) gives
        the filtered mean and covariance at the end of every run.

    Notes
    -----
    Per step with :math:`F, Q, H, R`: :math:`S = HQH^\top + R`, :math:`K = QH^\top S^{-1}`,
    :math:`A = (I-KH)F`, :math:`b = Ky`, :math:`C = (I-KH)Q`, :math:`\eta = F^\top H^\top
    S^{-1}y`, :math:`J = F^\top H^\top S^{-1}HF`; the first step of the log uses the prior in
    place of :math:`F x + w` and has :math:`A = 0`.
    """
    t = np.asarray(t, float)
    Y = np.asarray(Y, float)
    p = model.n_coef
    acc = None
    prev_t = t_prev
    for k in range(len(t)):
        idx = np.flatnonzero(np.isfinite(Y[k]))
        if first and k == 0:
            m, P = np.zeros(p), np.diag(model.prior_var)
            if idx.size:
                u = measurement_update(P, model.H[idx], model.noise_var[idx], m=m, y=Y[k, idx])
                m, P = u.m, u.P
            e = (np.zeros((p, p)), m, P, np.zeros(p), np.zeros((p, p)))
        else:
            f, q = model.transition(t[k] - prev_t)
            F, Q = np.diag(f), np.diag(q)
            if idx.size:
                Ho = model.H[idx]
                u = measurement_update(Q, Ho, model.noise_var[idx], joseph=False)
                HF = Ho * f[None, :]
                e = (u.IKH * f[None, :], u.K @ Y[k, idx], u.P, HF.T @ u.Sinv @ Y[k, idx],
                     HF.T @ u.Sinv @ HF)
            else:
                e = (F, np.zeros(p), Q, np.zeros(p), np.zeros((p, p)))
        acc = e if acc is None else _combine_filter(acc, e)
        prev_t = t[k]
    return acc


def _combine_smoother(ei, ej):
    """Combine smoothing elements: ``ei`` (earlier frame) with ``ej`` (the frames after)."""
    Ei, gi, Li = ei
    Ej, gj, Lj = ej
    L = Ei @ Lj @ Ei.T + Li
    return Ei @ Ej, Ei @ gj + gi, 0.5 * (L + L.T)


def smoother_summary(seg, next_pred=None):
    r"""The smoothing element of a filtered run: :math:`x_{\rm first} \mid x_{\rm next}`.

    ``next_pred`` is ``(f, P^-)`` of the frame after the run (None at the end of the log).
    Per frame (Särkkä & García-Fernández 2021, Lemma 10): :math:`E = P_kF^\top
    (P^-_{k+1})^{-1}`, :math:`g = m_k - E F m_k`, :math:`L = P_k - E F P_k`; at the last
    frame of the log :math:`E = 0`, :math:`g = m_T`, :math:`L = P_T`.
    """
    L_ = len(seg.t)
    p = seg.m.shape[1]
    acc = None
    for k in range(L_ - 1, -1, -1):
        P = seg.P_table[seg.fid[k]]
        nxt = seg.pred_table[seg.pid[k + 1]] if k + 1 < L_ else next_pred
        if nxt is None:
            e = (np.zeros((p, p)), seg.m[k].copy(), P)
        else:
            f, Pp = nxt
            E = np.linalg.solve(Pp, f[:, None] * P).T
            EF = E * f[None, :]
            e = (E, seg.m[k] - EF @ seg.m[k], P - EF @ P)
        acc = e if acc is None else _combine_smoother(e, acc)
    return acc
