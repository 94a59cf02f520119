r"""Error contrasts of the readings for restricted maximum likelihood, in either size regime.

Notes
-----
Whitened readings :math:`Wy`, fixed-effect columns :math:`X = WG_0` (the broad mean level) and
the prior part :math:`A = WG_1D_1` (:math:`D_1` the prior sd pattern for :math:`\tau = 1`).
With :math:`Q` an orthonormal basis of the complement of :math:`\operatorname{range}X`, the
contrasts :math:`z = Q^\top Wy` are :math:`N(0, \sigma^2(xQ^\top AA^\top Q + I))`. The
eigendecomposition :math:`Q^\top AA^\top Q = U\operatorname{diag}(\kappa)U^\top` with
:math:`B = QU`, :math:`w = B^\top Wy` serves every scale :math:`x`, and the projected
precision is

.. math:: P_0 = W B\operatorname{diag}(d)B^\top W/\sigma^2,\qquad d_k = 1/(x\kappa_k + 1)

(Patterson & Thompson 1971; Harville 1977). Only the non-zero :math:`\kappa` carry
information: with :math:`M = I - Q_0Q_0^\top` (:math:`Q_0` an orthonormal basis of
:math:`\operatorname{range}X`) and the thin SVD :math:`MA = B_r S V^\top`,
:math:`\kappa_r = S^2` and

.. math:: P_0 = W\bigl(M - B_r\operatorname{diag}(1 - d_r)B_r^\top\bigr)W/\sigma^2,

the other directions (:math:`d = 1`) entering through :math:`\|z\|^2 - \|w_r\|^2 =
\|Wy - \Pi_{[X\,A]}Wy\|^2`. :class:`Contrasts` takes this route when readings outnumber
coefficients: one blocked QR of :math:`[X\ A\ Wy\ Wv]` (:func:`~invert.stages._spectrum.
triangular_factor`) gives :math:`MA = Q_1R_{11}`, so the SVD of the small :math:`R_{11} =
U_RSV^\top` gives :math:`\kappa_r` and :math:`w_r = U_R^\top Q_1^\top Wy`; the per-reading
quantities (:math:`P_0y`, :math:`P_0v`, :math:`\operatorname{diag}P_0`) are formed in row
blocks from :math:`B_r = MAVS^{-1}`. Memory and time are linear in the number of readings.
With fewer readings than coefficients the ``m x m`` eigendecomposition is small and is used.
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from ..stages._spectrum import ROW_BLOCK, economy_route, triangular_factor

__all__ = ["Contrasts"]


class Contrasts:
    r"""REML error contrasts of whitened readings, and products with the projected precision.

    Parameters
    ----------
    G : ndarray of shape (m, p)
        Design of the readings.
    fixed : ndarray of bool, shape (p,)
        Columns taken as fixed effects (the broad mean level).
    prior_sd : ndarray of shape (p,)
        Prior sd pattern of the columns (``tau = 1``; entries of fixed columns unused).
    noise : ndarray of shape (m,)
        Noise sd per reading (ones when the level is common and unknown).
    y : ndarray of shape (m,)
        Readings.
    v : ndarray of shape (m,)
        A second per-reading vector whose precision products are wanted (the source pattern).
    block : int, default=ROW_BLOCK

    Attributes
    ----------
    kappa : ndarray of shape (r,)
        Non-negative eigenvalues of the informative directions.
    w : ndarray of shape (r,)
        Contrast coordinates :math:`B^\top Wy` on them.
    perp2 : float
        :math:`\sum w^2` over the remaining ``n - r`` directions (where :math:`\kappa = 0`).
    n : int
        Number of contrasts, ``m - p0``.
    p0 : int
        Number of fixed columns.
    """

    def __init__(self, G, fixed, prior_sd, noise, y, v, *, block=ROW_BLOCK):
        self.fixed = np.asarray(fixed, bool)
        self.wt = 1.0 / np.asarray(noise, float)
        self.G, self.y, self.v = G, np.asarray(y, float), np.asarray(v, float)
        self.sd = np.asarray(prior_sd, float)
        self.block = int(block)
        m, p = G.shape
        self.p0 = int(self.fixed.sum())
        self.n = m - self.p0
        if economy_route(m, p):
            self._economy()
        else:
            self._dense()

    # --- the two factorisations ---------------------------------------------------------------
    def _dense(self):
        # The m x m route (few readings): B spans every contrast direction.
        wt, fx = self.wt, self.fixed
        A = (wt[:, None] * self.G[:, ~fx]) * self.sd[~fx]
        X = wt[:, None] * self.G[:, fx]
        Qf, _ = linalg.qr(X, mode="full")
        Q = Qf[:, X.shape[1]:]
        AQ = Q.T @ A
        kappa, U = linalg.eigh(AQ @ AQ.T)
        self._B = Q @ U
        self.kappa = np.clip(kappa, 0.0, None)
        self.w = self._B.T @ (wt * self.y)
        self._Bv = self._B.T @ (wt * self.v)
        self.perp2 = 0.0

    def _economy(self):
        # Columns ordered [X, A]; two extra right-hand sides W y and W v ride along.
        fx, p0 = self.fixed, self.p0
        order = np.concatenate([np.flatnonzero(fx), np.flatnonzero(~fx)])
        scale = np.where(fx, 1.0, self.sd)[order]
        Gx = self.G[:, order]
        k = Gx.shape[1]
        R, z, rho2 = triangular_factor(np.column_stack([Gx, self.v]), self.wt,
                                       np.append(scale, 1.0), self.y, block=self.block)
        R00, R01, R11 = R[:p0, :p0], R[:p0, p0:k], R[p0:k, p0:k]
        Ur, S, Vt = linalg.svd(R11, lapack_driver="gesdd")
        self.kappa = S**2
        self.w = Ur.T @ z[p0:k]
        self._Bv = Ur.T @ R[p0:k, k]
        # ||W y - proj onto [X A W v]||^2 plus the part along W v outside [X A].
        self.perp2 = rho2 + float(z[k] ** 2)
        self._order, self._scale = order, scale
        self._R00, self._R01, self._R11 = R00, R01, R11
        self._P = Vt.T / np.where(S > 0, S, np.inf)
        self._qx_y = z[:p0]
        self._qx_v = R[:p0, k]

    def _rows(self):
        # Yield (rows, W_rows, Q0 rows, B_r rows) block by block (economy route).
        p0, k = self.p0, len(self._order)
        for start in range(0, len(self.y), self.block):
            sl = slice(start, start + self.block)
            Gb = self.G[sl][:, self._order] * self._scale
            wb = self.wt[sl]
            Xb, Ab = wb[:, None] * Gb[:, :p0], wb[:, None] * Gb[:, p0:k]
            Q0 = linalg.solve_triangular(self._R00, Xb.T, trans="T").T if p0 else Xb[:, :0]
            MA = Ab - Q0 @ self._R01
            yield sl, wb, Q0, MA @ self._P

    # --- products with P0 --------------------------------------------------------------------
    def precision(self, dd, sig2):
        r"""Return :math:`P_0y`, :math:`P_0v` and :math:`\operatorname{diag}P_0`, each (m,).

        Parameters
        ----------
        dd : ndarray of shape (r,)
            :math:`1/(x\kappa + 1)` on the informative directions.
        sig2 : float
            Noise variance factor.
        """
        if not hasattr(self, "_order"):
            wt = self.wt
            P0 = wt[:, None] * ((self._B * dd) @ self._B.T) * wt[None, :] / sig2
            P0 = 0.5 * (P0 + P0.T)
            return P0 @ self.y, P0 @ self.v, np.diag(P0).copy()
        m = len(self.y)
        Py, Pv, dP = np.empty(m), np.empty(m), np.empty(m)
        cy, cv = (1.0 - dd) * self.w, (1.0 - dd) * self._Bv
        for sl, wb, Q0, Br in self._rows():
            Py[sl] = wb * (wb * self.y[sl] - Q0 @ self._qx_y - Br @ cy) / sig2
            Pv[sl] = wb * (wb * self.v[sl] - Q0 @ self._qx_v - Br @ cv) / sig2
            dP[sl] = wb**2 * (1.0 - np.sum(Q0**2, axis=1) - (Br**2) @ (1.0 - dd)) / sig2
        return Py, Pv, dP
