r"""Rauch–Tung–Striebel smoother of the coefficients, and the in-memory filter-smoother.

The batch driver (:mod:`invert.batch.runner`) runs :func:`smooth_segment` backwards over the
filtered segments; :class:`KalmanSmoother` wraps both passes for arrays held in memory.

Notes
-----
Smoother (Rauch, Tung & Striebel 1965; Särkkä 2013, Thm 8.2): :math:`G_k = P_kF_{k+1}^\top
(P^-_{k+1})^{-1}`, :math:`m^s_k = m_k + G_k(m^s_{k+1} - m^-_{k+1})`, :math:`P^s_k = P_k +
G_k(P^s_{k+1} - P^-_{k+1})G_k^\top`. The steady-state shortcut of the filter holds backwards
too: once :math:`P^s` stops changing, :math:`m^s_j = (I - GF)m_j + G m^s_{j+1}` over the run.

References
----------
.. [1] H. E. Rauch, F. Tung and C. T. Striebel, "Maximum likelihood estimates of linear dynamic
       systems", AIAA Journal 3:1445–1450, 1965. doi:10.2514/3.3166
.. [2] S. Särkkä, *Bayesian Filtering and Smoothing*, Cambridge University Press, 2013,
       Thm 8.2. doi:10.1017/CBO9781139344203
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .filter import FilterState, filter_segment, fit_time_scale
from .recursion import close_relative, linear_recursion

__all__ = ["KalmanSmoother", "SmoothedSeries", "SmootherState", "run_smoother",
           "smooth_segment"]


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
    r"""Run the RTS smoother backwards over one filtered segment.

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
    eye = np.eye(p)
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
            Xr = linear_recursion(frozen["G"], seg.m[rows], ms_next, reverse=True,
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
        if steady_tol > 0 and last == key and close_relative(Ps, Ps_next, steady_tol):
            new_frozen = {"key": key, "G": G, "IGF": eye - G * f[None, :], "Ps": Ps, "sid": None}
        elif steady_tol > 0 and max_transient and run >= max_transient:
            from scipy.linalg import solve_discrete_lyapunov

            X = solve_discrete_lyapunov(G, P - G @ Pp @ G.T)
            new_frozen = {"key": key, "G": G, "IGF": eye - G * f[None, :], "Ps": 0.5 * (X + X.T),
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
        """Return the :class:`~invert.problem.Estimate` of frame ``k``."""
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
