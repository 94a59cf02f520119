r"""One SVD of the problem in standard form serves every regularisation parameter.

Notes
-----
With prior sd pattern :math:`d_j` (``tau = 1``) and weights :math:`W = \operatorname{diag}(1/
\sigma_i)`, write :math:`c = D\tilde x`, :math:`\tilde A = W G D`, :math:`\tilde y = W y` and
take the thin SVD :math:`\tilde A = U \operatorname{diag}(s_i) V^\top`, :math:`\beta = U^\top
\tilde y`. For penalty :math:`\alpha\|\tilde x\|^2` the filter factors are :math:`f_i = s_i^2
/(s_i^2+\alpha)` and

.. math::
   \|r_\alpha\|^2 = \sum_i ((1-f_i)\beta_i)^2 + \|\tilde y - UU^\top\tilde y\|^2,\qquad
   \operatorname{tr} A_\alpha = \sum_i f_i,\qquad
   \tilde x_\alpha = V \operatorname{diag}(f_i/s_i)\beta.

The equivalent Gaussian posterior of :math:`\tilde x` (noise variance 1 after whitening, prior
variance :math:`1/\alpha`) has covariance
:math:`V \operatorname{diag}(1/(s_i^2+\alpha)) V^\top + V_0 V_0^\top/\alpha`, with
:math:`V_0` spanning the null space of :math:`\tilde A`.

References
----------
.. [1] P. C. Hansen, *Discrete Inverse Problems*, SIAM, 2010, ch. 4–5.
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

__all__ = ["Spectrum", "standard_form", "rank_mask", "triangular_factor",
           "unit_factor", "economy_route", "RANK_RTOL", "ROW_BLOCK"]

#: Singular values below this fraction of the largest are treated as zero (the numerical rank
#: of the standard-form matrix; about 1e3 times the double-precision rounding level, common
#: practice for rank decisions).
RANK_RTOL = 1e-13


def standard_form(G, weights, prior_sd):
    r"""Build the standard-form matrix :math:`\tilde A = W G D` (stacks broadcast).

    Parameters
    ----------
    G : ndarray of shape (..., m, p)
    weights : ndarray of shape (..., m)
        :math:`1/\sigma_i` per reading.
    prior_sd : ndarray of shape (p,)
        Prior sd pattern :math:`d_j` with ``tau = 1``.

    Returns
    -------
    ndarray of shape (..., m, p)
    """
    return (np.asarray(weights, float)[..., :, None] * G) * np.asarray(prior_sd, float)


def rank_mask(s):
    """Singular values kept: ``s > s_max * RANK_RTOL`` (``s`` descending along the last axis)."""
    s = np.asarray(s, float)
    if s.shape[-1] == 0:
        return np.zeros(s.shape, bool)
    return s > s[..., :1] * RANK_RTOL


#: Readings per row block on the economy route: the working arrays stay at a few MB whatever
#: the number of readings (8192 rows x 100 coefficients x 8 bytes = 6.6 MB).
ROW_BLOCK = 8192


def triangular_factor(G, weights, prior_sd, y, *, block=ROW_BLOCK):
    r"""Triangular factor of the augmented standard form :math:`[\tilde A\mid\tilde y]` by blocks.

    Parameters
    ----------
    G : ndarray of shape (m, p)
    weights : ndarray of shape (m,)
    prior_sd : ndarray of shape (p,)
    y : ndarray of shape (m,)
    block : int, default=ROW_BLOCK
        Rows taken per step (at least ``p + 1`` are used).

    Returns
    -------
    R : ndarray of shape (p, p)
        :math:`\tilde A = QR` with :math:`Q` (never formed) of orthonormal columns.
    z : ndarray of shape (p,)
        :math:`Q^\top\tilde y`.
    rho2 : float
        :math:`\|\tilde y - QQ^\top\tilde y\|^2`, formed without cancellation.

    Notes
    -----
    Householder QR of the stacked rows is updated block by block: the factor of
    :math:`[R_{k-1}; X_k]` is that of all rows so far (the tall-skinny QR of Demmel et al.,
    2012, doi:10.1137/080731992; Golub & Van Loan, *Matrix Computations*, 4th ed., §5.2).
    Memory is :math:`O((\text{block} + p)\,p)`, time :math:`O(m p^2)`: one pass over the
    readings.
    """
    m, p = G.shape
    w = np.asarray(weights, float)
    step = max(int(block), 4 * (p + 1))
    R = np.empty((0, p + 1))
    for start in range(0, m, step):
        sl = slice(start, start + step)
        X = np.empty((len(w[sl]), p + 1))
        X[:, :p] = standard_form(G[sl], w[sl], prior_sd)
        X[:, p] = w[sl] * y[sl]
        R = np.linalg.qr(np.vstack([R, X]), mode="r")
    Raug = np.zeros((p + 1, p + 1))
    Raug[: R.shape[0]] = R
    return Raug[:p, :p], Raug[:p, p], float(Raug[p, p] ** 2)


def economy_route(m, p) -> bool:
    """Whether ``m`` readings and ``p`` coefficients take the economy route (``m > p``)."""
    return m > p


def unit_factor(problem, *, block=ROW_BLOCK):
    """Return :func:`triangular_factor` of the problem with unit prior sd, or None if ``m <= p``.

    The factor for any prior sd pattern ``d`` is ``(R * d, z, rho2)``: scaling the columns of
    :math:`WG` by ``d`` keeps :math:`Q` and scales the columns of the triangular :math:`R`.
    One pass over the readings then serves every smoothness order a stage tries.
    """
    if not economy_route(problem.n_readings, problem.n_coef):
        return None
    return triangular_factor(problem.G, problem.weights, np.ones(problem.n_coef), problem.y,
                             block=block)


class Spectrum:
    r"""Standard-form SVD of a :class:`~invert.problem.LinearProblem` for a given prior shape.

    Parameters
    ----------
    problem : LinearProblem
    prior_sd : ndarray of shape (n_coef,)
        Prior sd pattern :math:`d_j` with ``tau = 1``.
    block : int, default=ROW_BLOCK
        Readings per row block on the economy route.
    factor : tuple, optional
        :func:`unit_factor` of the same problem, reused instead of a new pass over the
        readings.

    Notes
    -----
    With more readings than coefficients (``m > p``) the SVD is that of the triangular factor
    :math:`R` of :math:`\tilde A = QR` (:func:`triangular_factor`): :math:`R = U_R S V^\top`
    gives :math:`U = QU_R`, :math:`\beta = U_R^\top Q^\top\tilde y`, and the per-reading
    rows of :math:`U = \tilde A V S^{-1}` are formed block by block when asked
    (:meth:`row_blocks`), so memory and time grow linearly in ``m`` (no ``m x m`` factor). With
    ``m <= p`` the full SVD of :math:`\tilde A` is taken (it is small).
    """

    def __init__(self, problem, prior_sd, *, block=ROW_BLOCK, factor=None):
        w = problem.weights
        self.d = np.asarray(prior_sd, dtype=float)
        self.m = problem.n_readings
        self.block = int(block)
        self.problem = problem
        self._w = w
        yt = w * problem.y
        self.ytilde = yt
        self.log_w = float(np.sum(np.log(w)))
        if economy_route(self.m, problem.n_coef):
            if factor is None:
                R, z, rho2 = triangular_factor(problem.G, w, self.d, problem.y, block=block)
            else:
                R, z, rho2 = factor[0] * self.d, factor[1], factor[2]
            Ur, s, Vt = linalg.svd(R, lapack_driver="gesdd")
            k = int(np.sum(rank_mask(s)))
            zr = Ur.T @ z
            self.beta = zr[:k]
            # Residual outside the range of U: the part of y~ outside range(A~) plus the
            # components on directions below the rank cut-off.
            self.r_perp2 = rho2 + float(np.sum(zr[k:] ** 2))
            self._U = None
        else:
            A = standard_form(problem.G, w, self.d)
            U, s, Vt = linalg.svd(A, full_matrices=True, lapack_driver="gesdd")
            k = int(np.sum(rank_mask(s)))
            self._U = U[:, :k]
            self.beta = self._U.T @ yt
            # Residual outside the range of U, formed directly (never as ||y||^2 - ||beta||^2).
            self.r_perp2 = float(np.sum((yt - self._U @ self.beta) ** 2))
        self.s, self.Vt = s[:k], Vt[:k]
        # Rows k: of the full V^T span the null space of A~ (prior-only directions). Keeping
        # them lets the covariance be formed as a sum of positive terms, without the
        # cancellation of I/alpha - (...) that loses digits on the broad mean level.
        self.Vt_null = Vt[k:]

    def row_blocks(self):
        """Yield ``(rows, U[rows])`` over blocks of readings (``U`` formed block by block)."""
        if self._U is not None:
            yield slice(0, self.m), self._U
            return
        P = self.Vt.T / self.s
        G = self.problem.G
        for start in range(0, self.m, self.block):
            sl = slice(start, start + self.block)
            yield sl, standard_form(G[sl], self._w[sl], self.d) @ P

    @property
    def U(self):
        """Left singular vectors of the kept directions, shape (m, k) (formed when asked)."""
        if self._U is None:
            U = np.empty((self.m, self.s.size))
            for sl, Ub in self.row_blocks():
                U[sl] = Ub
            self._U = U
        return self._U

    def filter_factors(self, alpha):
        r"""Compute the filter factors for each alpha.

        Filter factors :math:`f_i = s_i^2/(s_i^2+\alpha)`, shape (k, n_alpha) (alpha as
        the last axis).
        """
        alpha = np.atleast_1d(np.asarray(alpha, dtype=float))
        s2 = self.s[:, None] ** 2
        return s2 / (s2 + alpha[None, :])

    def residual2(self, alpha):
        """Squared whitened residual norm at each alpha."""
        f = self.filter_factors(alpha)
        return np.sum(((1 - f) * self.beta[:, None]) ** 2, axis=0) + self.r_perp2

    def dof(self, alpha):
        """Effective degrees of freedom ``tr A_alpha``."""
        return np.sum(self.filter_factors(alpha), axis=0)

    def solution_norm2(self, alpha):
        """Squared norm of the standard-form solution."""
        f = self.filter_factors(alpha)
        return np.sum((f * self.beta[:, None] / self.s[:, None]) ** 2, axis=0)

    def hat_diag(self, alpha):
        """Diagonal of the whitened hat matrix, shape (m, n_alpha), as a row sum."""
        f = self.filter_factors(alpha)
        out = np.empty((self.m, f.shape[1]))
        for sl, Ub in self.row_blocks():
            out[sl] = (Ub**2) @ f
        return out

    def residuals(self, alpha):
        """Whitened residuals, shape (m, n_alpha)."""
        fb = self.filter_factors(alpha) * self.beta[:, None]
        out = np.empty((self.m, fb.shape[1]))
        for sl, Ub in self.row_blocks():
            out[sl] = self.ytilde[sl, None] - Ub @ fb
        return out

    def loo_mean_square(self, alpha):
        r"""Mean squared leave-one-out residual :math:`\frac1m\sum_i (r_i/(1-A_{ii}))^2`.

        Accumulated over row blocks (memory independent of ``m`` and of the number of
        ``alpha`` values times ``m``); shape (n_alpha,).
        """
        f = self.filter_factors(alpha)
        fb = f * self.beta[:, None]
        total = np.zeros(f.shape[1])
        for sl, Ub in self.row_blocks():
            r = self.ytilde[sl, None] - Ub @ fb
            h = (Ub**2) @ f
            total += np.sum((r / (1 - h)) ** 2, axis=0)
        return total / self.m

    def coef(self, alpha):
        """Coefficients ``c = D x_alpha`` for one alpha."""
        f = self.filter_factors(alpha)[:, 0]
        return self.d * (self.Vt.T @ (f * self.beta / self.s))

    def cov(self, alpha, noise_var=1.0):
        """Compute the posterior covariance of ``c`` for one alpha.

        Posterior covariance of ``c`` for one alpha, in units where the given sigmas (or
        the common noise level) are scaled by ``noise_var``.
        """
        B, h = self.cov_factor(alpha)
        return noise_var * ((B * h) @ B.T)

    def cov_factor(self, alpha):
        """``(B, h)`` with posterior covariance ``B diag(h) B^T`` (noise variance 1)."""
        alpha = float(alpha)
        Vt = np.vstack([self.Vt, self.Vt_null])
        h = np.concatenate([1.0 / (self.s**2 + alpha), np.full(len(self.Vt_null), 1.0 / alpha)])
        return self.d[:, None] * Vt.T, h

    def quad_and_logdet(self, alpha):
        r"""``y~^T C^{-1} y~`` and ``log|C|`` for :math:`C = \tilde A\tilde A^\top/\alpha + I`."""
        alpha = np.atleast_1d(np.asarray(alpha, dtype=float))
        g = 1 + self.s[:, None] ** 2 / alpha[None, :]
        quad = np.sum(self.beta[:, None] ** 2 / g, axis=0) + self.r_perp2
        return quad, np.sum(np.log(g), axis=0)

    def log_evidence(self, alpha, noise_known):
        r"""Log marginal likelihood of the readings (in their own units) at each alpha.

        With known noise, :math:`y \sim N(0, W^{-1}CW^{-1})`; with an unknown common level the
        noise variance is profiled out at :math:`\hat\sigma^2 = \tilde y^\top C^{-1}\tilde y/m`.
        """
        quad, logdet = self.quad_and_logdet(alpha)
        m = self.m
        if noise_known:
            return -0.5 * (quad + logdet + m * np.log(2 * np.pi)) + self.log_w
        s2 = quad / m
        return -0.5 * (m * np.log(s2) + m + logdet + m * np.log(2 * np.pi))

    def ml_noise_var(self, alpha):
        """Profiled maximum-likelihood noise variance at each alpha."""
        quad, _ = self.quad_and_logdet(alpha)
        return quad / self.m

    def alpha_grid(self, n=200):
        """Log-spaced alpha grid spanning the informative singular values."""
        s = self.s
        # The broad prior on the mean level inflates one singular value; leave it out of the
        # range when it stands far above the rest.
        core = s[1:] if s.size > 1 and s[0] > 30 * s[1] else s
        hi = core.max() ** 2 * 1e2
        # At least 14 decades below the top, so that nearly exact data (tiny sigma) still find
        # their optimum inside the range; at most 24 (double precision).
        lo = max(min(core.min() ** 2 * 1e-2, hi * 1e-14), hi * 1e-24)
        return np.logspace(np.log10(lo), np.log10(hi), n)
