r"""Parallel-in-time elements of the filter and the smoother (Särkkä & García-Fernández 2021).

A run of frames is summarised as one associative element; combining the elements of
consecutive runs in order (a scan, which may run as a tree on a cluster) gives the filtered
state at the end of every run and the smoothed state at its start, exactly.

References
----------
.. [1] S. Särkkä and Á. F. García-Fernández, "Temporal parallelization of Bayesian smoothers",
       IEEE Trans. Automatic Control 66:299–306, 2021. doi:10.1109/TAC.2020.2976316
"""

from __future__ import annotations

import numpy as np

from .filter import information_update, measurement_update

__all__ = ["combine_filter", "combine_smoother", "filter_summary", "smoother_summary"]


def combine_filter(ei, ej):
    """Associative combination of filtering elements ``ei`` (earlier) and ``ej`` (later)."""
    Ai, bi, Ci, etai, Ji = ei
    Aj, bj, Cj, etaj, Jj = ej
    p = len(bi)
    eye = np.eye(p)
    M = np.linalg.inv(eye + Ci @ Jj)
    AjM = Aj @ M
    A = AjM @ Ai
    b = AjM @ (bi + Ci @ etaj) + bj
    C = AjM @ Ci @ Aj.T + Cj
    N = np.linalg.inv(eye + Jj @ Ci)
    AiN = Ai.T @ N
    eta = AiN @ (etaj - Jj @ bi) + etai
    J = AiN @ Jj @ Ai + Ji
    return A, b, 0.5 * (C + C.T), eta, 0.5 * (J + J.T)


def filter_summary(model, t, Y, *, t_prev=np.nan, first=False):
    r"""Summarise a run of frames as one associative filtering element.

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
                # from the diagonal prior: information form (no cancellation, filter.py)
                u = information_update(model.prior_var, model.H[idx], model.noise_var[idx],
                                       m=m, y=Y[k, idx])
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
        acc = e if acc is None else combine_filter(acc, e)
        prev_t = t[k]
    return acc


def combine_smoother(ei, ej):
    """Combine smoothing elements: ``ei`` (earlier frame) with ``ej`` (the frames after)."""
    Ei, gi, Li = ei
    Ej, gj, Lj = ej
    L = Ei @ Lj @ Ei.T + Li
    return Ei @ Ej, Ei @ gj + gi, 0.5 * (L + L.T)


def smoother_summary(seg, next_pred=None):
    r"""Summarise a filtered run as one smoothing element, :math:`x_{\rm first} \mid x_{\rm next}`.

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
        acc = e if acc is None else combine_smoother(e, acc)
    return acc
