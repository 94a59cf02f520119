r"""Compiled loops (numba) of the exact filter and smoother; see :mod:`.kernel` for the maths.

Every array argument is float64 and C-contiguous (bool for ``rw``, int64 for indices); the
state width ``p`` is the kernel's padded width. Only :func:`forward_pass` and
:func:`backward_pass` are called from outside.
"""

from __future__ import annotations

import math

import numba
import numpy as np

__all__ = ["backward_pass", "forward_pass"]

_LOG2PI = math.log(2.0 * math.pi)
#: Smallest weight of a reading judged faulty: its variance grows at most 1e10-fold (the
#: reading then moves the state by less than 1e-5 of its innovation in sds).
_W_MIN = 1e-10
# Reassociation lets the row dot products run as SIMD reductions (rounding order only); no
# "nnan"/"ninf" flags: the kernel tests readings for NaN.
_JIT = {"cache": True, "nogil": True, "fastmath": {"reassoc", "contract"}}


@numba.njit(**_JIT)
def _transition(dt, T, rw, drift, f, q):
    """Diagonals of F and Q for a step ``dt`` into ``f`` and ``q``."""
    e = math.exp(-dt / T)
    e2 = -math.expm1(-2.0 * dt / T)
    for j in range(f.size):
        if rw[j]:
            f[j] = 1.0
            q[j] = drift[j] * 2.0 * dt / T
        else:
            f[j] = e
            q[j] = drift[j] * e2


@numba.njit(**_JIT)
def _predict(m, P, f, q):
    """Predict in place: m <- f m, P <- F sym(P) F + Q (F, Q diagonal), one triangular pass.

    The updates leave ``P`` symmetric only to rounding; the symmetrisation is done here.
    """
    p = m.size
    for a in range(p):
        m[a] *= f[a]
        fa = f[a]
        P[a, a] = P[a, a] * (fa * fa) + q[a]
        for b in range(a):
            x = 0.5 * (P[a, b] + P[b, a]) * (fa * f[b])
            P[a, b] = x
            P[b, a] = x


@numba.njit(**_JIT)
def _symmetrise(P):
    p = P.shape[0]
    for a in range(p):
        for b in range(a):
            x = 0.5 * (P[a, b] + P[b, a])
            P[a, b] = x
            P[b, a] = x


@numba.njit(**_JIT)
def _sym_matvec(P, x, out):
    """Compute out = P x by row dot products (P symmetric: its rows stand for columns)."""
    p = x.size
    for a in range(p):
        acc = 0.0
        for b in range(p):
            acc += P[a, b] * x[b]
        out[a] = acc


@numba.njit(**_JIT)
def _fault_weight(v, s, r_i, eps, rbad_i, bad_row, i):
    r"""Robust variance of one reading under the good/faulty predictive mixture.

    Returns ``(s_eff, log-likelihood term without the 2 pi)``: :math:`w = P(\text{good} \mid
    \nu)` under :math:`(1-\varepsilon) N(\nu; 0, s) + \varepsilon N(\nu; 0, s + b_i)`, the
    reading's variance :math:`r_i / w` (floored weight ``_W_MIN``), so
    :math:`s_{\text{eff}} = s + r_i (1/w - 1)`; the fault probability :math:`1 - w` goes to
    ``bad_row[i]``.
    """
    sb = s + rbad_i
    lg = math.log1p(-eps) - 0.5 * (math.log(s) + v * v / s)
    lb = math.log(eps) - 0.5 * (math.log(sb) + v * v / sb)
    top = max(lg, lb)
    ll = top + math.log(math.exp(lg - top) + math.exp(lb - top))
    d = lb - lg
    pbad = 1.0 / (1.0 + math.exp(-d)) if d > -700.0 else 0.0
    w = 1.0 / (1.0 + math.exp(d)) if d < 700.0 else 0.0
    bad_row[i] = pbad
    w = max(w, _W_MIN)
    return s + r_i * (1.0 / w - 1.0), ll


@numba.njit(**_JIT)
def _update(H, r, y, m, P, u, gains, svar, innov, sens, eps, rbad, bad_row):
    """Sequential scalar updates over the observed readings of one frame.

    Records per reading the gain ``k`` (rows of ``gains``), ``s``, the innovation and the
    sensor index; returns (number used, log-likelihood term, chi-square). One pass over
    ``P`` per reading: the rank-one update of row ``a`` and that row's share of the next
    reading's :math:`u = P h` are done together (``P`` symmetric, so rows are columns).
    With ``eps > 0`` each reading's variance is first replaced by its robust value
    (:func:`_fault_weight`, decided from the prediction only, so a recomputed pass makes the
    same decisions); ``eps = 0`` leaves every operation of the plain update unchanged.
    """
    ns, p = H.shape
    n = 0
    for i in range(ns):
        if y[i] == y[i]:  # not NaN
            sens[n] = i
            n += 1
    if n == 0:
        return 0, 0.0, 0.0
    un = np.empty(p)
    lrob = 0.0
    ll = 0.0
    chi2 = 0.0
    _sym_matvec(P, H[sens[0]], u)
    for o in range(n):
        i = sens[o]
        h = H[i]
        s = r[i]
        hm = 0.0
        for b in range(p):
            s += h[b] * u[b]
            hm += h[b] * m[b]
        v = y[i] - hm
        if eps > 0.0:
            s, lrob = _fault_weight(v, s, r[i], eps, rbad[i], bad_row, i)
        inv = 1.0 / s
        k = gains[o]
        for b in range(p):
            k[b] = u[b] * inv
            m[b] += k[b] * v
        if o + 1 < n:
            hn = H[sens[o + 1]]
            for a in range(p):
                ka = k[a]
                acc = 0.0
                for b in range(p):
                    x = P[a, b] - ka * u[b]
                    P[a, b] = x
                    acc += x * hn[b]
                un[a] = acc
            for b in range(p):
                u[b] = un[b]
        else:
            for a in range(p):
                ka = k[a]
                for b in range(p):
                    P[a, b] -= ka * u[b]
        svar[o] = s
        innov[o] = v
        if eps > 0.0:
            ll += lrob - 0.5 * _LOG2PI
        else:
            ll -= 0.5 * (_LOG2PI + math.log(s) + v * v * inv)
        chi2 += v * v * inv
    return n, ll, chi2


@numba.njit(**_JIT)
def _info_update(H, r, y, m, P, dprior, mprior):
    """Block update in information form from a diagonal prior (first frame with readings).

    ``P`` holds the diagonal prior on entry; its diagonal and ``m`` are copied to ``dprior``
    and ``mprior``. Returns (number used, log-likelihood term, chi-square).
    """
    ns, p = H.shape
    for a in range(p):
        dprior[a] = P[a, a]
        mprior[a] = m[a]
    # J = D^-1 + H_o' R_o^-1 H_o,  b = H_o' R_o^-1 (y_o - H_o m^-)
    J = np.zeros((p, p))
    b = np.zeros(p)
    n = 0
    logdet = 0.0
    for i in range(ns):
        yi = y[i]
        if yi != yi:
            continue
        h = H[i]
        w = 1.0 / r[i]
        v = yi
        for c in range(p):
            v -= h[c] * m[c]
        for a in range(p):
            wha = w * h[a]
            b[a] += wha * v
            for c in range(p):
                J[a, c] += wha * h[c]
        logdet += math.log(r[i])
        n += 1
    if n == 0:
        return 0, 0.0, 0.0
    for a in range(p):
        J[a, a] += 1.0 / dprior[a]
        logdet += math.log(dprior[a])
    Lc = np.linalg.cholesky(J)
    for a in range(p):
        logdet += 2.0 * math.log(Lc[a, a])
    Pn = np.linalg.inv(J)
    _symmetrise(Pn)
    P[:, :] = Pn
    for a in range(p):
        x = 0.0
        for c in range(p):
            x += Pn[a, c] * b[c]
        m[a] = mprior[a] + x
    # v' S^-1 v = (y - H m)' R^-1 (y - H m) + (m - m^-)' D^-1 (m - m^-), a sum of squares
    chi2 = 0.0
    for a in range(p):
        chi2 += (m[a] - mprior[a]) ** 2 / dprior[a]
    for i in range(ns):
        yi = y[i]
        if yi != yi:
            continue
        e = yi
        for c in range(p):
            e -= H[i, c] * m[c]
        chi2 += e * e / r[i]
    return n, -0.5 * (n * _LOG2PI + logdet + chi2), chi2


@numba.njit(**_JIT)
def _step(H, r, drift, rw, T, eps, rbad, dt, y, m, P, f, q, u, gains, svar, innov, sens,
          informed, dprior, mprior, bad_row):
    """Predict (if ``dt`` is a number) and update one frame.

    Until the first reading of the log (``informed`` false) the covariance is diagonal and the
    update is done in information form (:func:`_info_update`), which keeps its accuracy under
    the broad prior of the mean level (that frame's readings are not screened for faults:
    there is no prediction to judge them by). Returns (n_used, loglik, chi2, informed,
    info_frame).
    """
    if dt == dt:
        _transition(dt, T, rw, drift, f, q)
        _predict(m, P, f, q)
    else:
        for a in range(f.size):
            f[a] = 1.0
    if not informed:
        n, ll, c2 = _info_update(H, r, y, m, P, dprior, mprior)
        return n, ll, c2, n > 0, n > 0
    n, ll, c2 = _update(H, r, y, m, P, u, gains, svar, innov, sens, eps, rbad, bad_row)
    return n, ll, c2, True, False


@numba.njit(**_JIT)
def forward_pass(H, r, drift, rw, T, eps, rbad, t, Y, m, P, tp, informed, every, cp_m, cp_P,
             cp_t, cp_i, chi2, n_used, frame_ll, fault):
    """Filter over all frames in place on (m, P); checkpoints before every ``every``-th frame.

    Returns (summed log-likelihood, informed). ``tp`` is the time of the frame before ``t[0]``
    (NaN at the start of the log: the first frame has no dynamics step). With ``eps > 0``,
    ``fault`` (shape ``(n_frames, n_sensors)``, zero on entry) receives each reading's fault
    probability; else it may have no rows.
    """
    ns, p = H.shape
    f = np.empty(p)
    q = np.empty(p)
    u = np.empty(p)
    dprior = np.empty(p)
    mprior = np.empty(p)
    gains = np.empty((ns, p))
    svar = np.empty(ns)
    innov = np.empty(ns)
    sens = np.empty(ns, np.int64)
    scratch = np.zeros(ns)
    total = 0.0
    for k in range(t.size):
        if k % every == 0:
            c = k // every
            cp_m[c] = m
            cp_P[c] = P
            cp_t[c] = tp
            cp_i[c] = informed
        row = fault[k] if eps > 0.0 else scratch
        n, ll, c2, informed, _ = _step(H, r, drift, rw, T, eps, rbad, t[k] - tp, Y[k], m, P, f,
                                       q, u, gains, svar, innov, sens, informed, dprior, mprior,
                                       row)
        n_used[k] = n
        frame_ll[k] = ll
        chi2[k] = c2
        total += ll
        tp = t[k]
    return total, informed


@numba.njit(**_JIT)
def _outputs(m, P, lam, Lam, Hq, level, tmp, tmp2, out_m, out_qm, out_qs, out_lm, out_ls):
    """Smoothed moments of one frame from the filtered (m, P) and the adjoint (lam, Lam)."""
    p = m.size
    _sym_matvec(P, lam, tmp)
    for b in range(p):
        out_m[b] = m[b] - tmp[b]
    for j in range(Hq.shape[0]):
        hq = Hq[j]
        _sym_matvec(P, hq, tmp)          # a = P hq
        _sym_matvec(Lam, tmp, tmp2)      # Lam a
        mean = 0.0
        var = 0.0
        for b in range(p):
            mean += hq[b] * out_m[b]
            var += hq[b] * tmp[b] - tmp[b] * tmp2[b]
        out_qm[j] = mean
        out_qs[j] = math.sqrt(var) if var > 0.0 else 0.0
    for j in range(level.size):
        c = level[j]
        _sym_matvec(Lam, P[c], tmp2)     # Lam P e_c (P symmetric: row c is column c)
        var = P[c, c]
        for b in range(p):
            var -= P[c, b] * tmp2[b]
        out_lm[j] = out_m[c]
        out_ls[j] = math.sqrt(var) if var > 0.0 else 0.0


@numba.njit(**_JIT)
def _adjoint_frame(H, lam, Lam, gains, svar, innov, sens, n, w, wn):
    r"""Adjoint back through the ``n`` scalar updates of one frame (last reading first).

    Per reading: :math:`\lambda \leftarrow C^\top\lambda - h\nu/s`, :math:`\Lambda
    \leftarrow \Lambda - h z^\top - z h^\top`, :math:`z = w - \tfrac12(k^\top w + 1/s)h`,
    :math:`w = \Lambda k`; the pass that updates :math:`\Lambda` also accumulates the next
    (earlier) reading's :math:`w`.
    """
    if n == 0:
        return
    p = lam.size
    _sym_matvec(Lam, gains[n - 1], w)
    for o in range(n - 1, -1, -1):
        h = H[sens[o]]
        k = gains[o]
        s = svar[o]
        kw = 0.0
        kl = 0.0
        for b in range(p):
            kw += k[b] * w[b]
            kl += k[b] * lam[b]
        c = 0.5 * (kw + 1.0 / s)
        for b in range(p):
            w[b] -= c * h[b]
        g = kl + innov[o] / s
        for b in range(p):
            lam[b] -= h[b] * g
        if o > 0:
            kn = gains[o - 1]
            for a in range(p):
                ha = h[a]
                wa = w[a]
                acc = 0.0
                for b in range(p):
                    x = Lam[a, b] - (ha * w[b] + wa * h[b])
                    Lam[a, b] = x
                    acc += x * kn[b]
                wn[a] = acc
            for b in range(p):
                w[b] = wn[b]
        else:
            for a in range(p):
                ha = h[a]
                wa = w[a]
                for b in range(p):
                    Lam[a, b] -= ha * w[b] + wa * h[b]


@numba.njit(**_JIT)
def _scale_symmetric(lam, Lam, f):
    """Take the adjoint through the dynamics: lam <- F lam, Lam <- F sym(Lam) F, one pass."""
    p = lam.size
    for a in range(p):
        lam[a] *= f[a]
        fa = f[a]
        Lam[a, a] *= fa * fa
        for b in range(a):
            x = 0.5 * (Lam[a, b] + Lam[b, a]) * (fa * f[b])
            Lam[a, b] = x
            Lam[b, a] = x


@numba.njit(**_JIT)
def _adjoint_info(m, P, lam, Lam, dprior, mprior):
    r"""Take the adjoint back through the information-form update of the first reading.

    :math:`\hat\lambda = -D^{-1}(m^s - m^-)`, :math:`\hat\Lambda = D^{-1} - D^{-1} P^s
    D^{-1}`, :math:`P^s = P - P\Lambda P` (from :math:`C = I - KH = P D^{-1}` and
    :math:`H^\top S^{-1} v = D^{-1}(m - m^-)`).
    """
    p = m.size
    PL = np.dot(P, Lam)
    Ps = P - np.dot(PL, P)
    ms = m - np.dot(P, lam)
    for a in range(p):
        lam[a] = -(ms[a] - mprior[a]) / dprior[a]
        for c in range(p):
            Lam[a, c] = -0.5 * (Ps[a, c] + Ps[c, a]) / (dprior[a] * dprior[c])
        Lam[a, a] += 1.0 / dprior[a]


@numba.njit(**_JIT)
def backward_pass(H, r, drift, rw, T, eps, rbad, t, Y, cp_m, cp_P, cp_t, cp_i, every, lam, Lam,
              Hq, level, out_m, out_qm, out_qs, out_lm, out_ls):
    """Backward over all segments (last first), recomputing each one's forward pass.

    ``lam``, ``Lam`` enter as the adjoint after the last frame (zero at the end of the log)
    and leave as the adjoint at the filtered state before ``t[0]``.
    """
    ns, p = H.shape
    n = t.size
    L = min(every, n)
    Pb = np.empty((L, p, p))
    Mb = np.empty((L, p))
    Fb = np.empty((L, p))
    Gb = np.empty((L, ns, p))
    Sb = np.empty((L, ns))
    Vb = np.empty((L, ns))
    Ib = np.empty((L, ns), np.int64)
    Nb = np.empty(L, np.int64)
    q = np.empty(p)
    u = np.empty(p)
    tmp = np.empty(p)
    dprior = np.empty(p)
    mprior = np.empty(p)
    m = np.empty(p)
    P = np.empty((p, p))
    scratch = np.zeros(ns)
    n_seg = (n + every - 1) // every
    for c in range(n_seg - 1, -1, -1):
        a = c * every
        b = min(n, a + every)
        m[:] = cp_m[c]
        P[:, :] = cp_P[c]
        tp = cp_t[c]
        informed = cp_i[c]
        j_info = -1
        for k in range(a, b):
            j = k - a
            res = _step(H, r, drift, rw, T, eps, rbad, t[k] - tp, Y[k], m, P, Fb[j], q, u,
                        Gb[j], Sb[j], Vb[j], Ib[j], informed, dprior, mprior, scratch)
            Nb[j] = res[0]
            informed = res[3]
            if res[4]:
                j_info = j
            Mb[j] = m
            Pb[j] = P
            tp = t[k]
        for k in range(b - 1, a - 1, -1):
            j = k - a
            _outputs(Mb[j], Pb[j], lam, Lam, Hq, level, u, tmp, out_m[k], out_qm[k],
                     out_qs[k], out_lm[k], out_ls[k])
            if j == j_info:
                _adjoint_info(Mb[j], Pb[j], lam, Lam, dprior, mprior)
            else:
                _adjoint_frame(H, lam, Lam, Gb[j], Sb[j], Vb[j], Ib[j], Nb[j], u, tmp)
            _scale_symmetric(lam, Lam, Fb[j])
