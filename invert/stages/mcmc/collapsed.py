r"""Collapsed (coefficient-free) Gaussian likelihood, batched over hyperparameter draws.

Shared by the ``gaussian`` and ``mcmc`` stages. Depends on NumPy only.

Notes
-----
With whitened rows (:math:`\tilde y = W y`, :math:`\tilde G = W G`, :math:`W =
\operatorname{diag}(1/\sigma_i)` or :math:`I` when no sigma is given), prior
:math:`c_j \sim N(0, \tau^2 v_j(s))`, :math:`v_j = (1+\lambda_j)^{-s}` for degree > 0 and
:math:`v_0 = \kappa^2` (the broad mean level, :data:`invert.prior.MEAN_SCALE`), and row noise
variances :math:`\nu_i^2` (whitened units), the coefficients integrate out:

.. math:: \tilde y \sim N\bigl(0,\ C\bigr),\qquad
          C = B + \tau^2\kappa^2 g_0 g_0^\top,\qquad
          B = \operatorname{diag}(\nu_i^2) + \tau^2 \sum_{n\ge 1} (1+\lambda_n)^{-s} K_n,

with :math:`K_n = \tilde G_n \tilde G_n^\top` summed over the columns of degree :math:`n`. The
broad mean-level column is handled by the Woodbury identity and the matrix determinant lemma,
so that only the well-conditioned :math:`B` is factorised (Cholesky, batched over draws):

.. math:: \log|C| = \log|B| + \log(1 + V_0 g_0^\top B^{-1} g_0),\quad
          \tilde y^\top C^{-1}\tilde y = \tilde y^\top B^{-1}\tilde y
          - \frac{V_0 (g_0^\top B^{-1}\tilde y)^2}{1 + V_0 g_0^\top B^{-1} g_0},

:math:`V_0 = \tau^2\kappa^2`. The log density of the readings in their own units adds
:math:`\sum_i \log w_i`. Given the hyperparameters the coefficients are Gaussian (Bishop 2006,
eqs. 3.53–3.54); exact draws come from the SVD of the fully whitened standard-form matrix
(:func:`~invert.stages._spectrum.standard_form`) :math:`A = N^{-1}\tilde G D`,
:math:`D = \operatorname{diag}(\sqrt{\text{prior var}})`:
:math:`x \mid y \sim N(V S(S^2+I)^{-1}U^\top \tilde y,\ I - V S^2(S^2+I)^{-1}V^\top)`,
:math:`c = D x`.

When one smoothness and one common noise level serve a whole batch (``s`` held fixed, no
faulty rows), a single SVD :math:`\tilde G\,\mathrm{diag}(\sqrt{v(s)}) = U S V^\top` (mean
level included, :math:`v_0 = \kappa^2`) serves every :math:`(\tau, \nu)`:
:math:`C = U\,\mathrm{diag}(\tau^2 S^2 + \nu^2)\,U^\top + \nu^2 (I - UU^\top)`, so the log
density, the leave-one-out moments and the exact draws cost :math:`O(m + p)` per row after it
(the spectral form of Golub, Heath & Wahba 1979 for the GCV function).

References
----------
.. [1] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.3 and §3.5.
.. [2] C. E. Rasmussen and C. K. I. Williams, *Gaussian Processes for Machine Learning*, MIT
       Press, 2006, §2.2 and §5.4 (marginal likelihood by Cholesky).
.. [3] G. H. Golub, M. Heath and G. Wahba, "Generalized cross-validation as a method for
       choosing a good ridge parameter", Technometrics 21(2):215–223, 1979.
"""

from __future__ import annotations

import numpy as np

from ...prior import MEAN_SCALE
from .._spectrum import standard_form, triangular_factor

_LOG2PI = float(np.log(2 * np.pi))


class CollapsedModel:
    r"""Marginal likelihood of the readings with the coefficients integrated out.

    Parameters
    ----------
    problem : LinearProblem
    mean_scale : float, default=MEAN_SCALE
        Prior sd of the degree-0 coefficient(s) relative to ``tau``.
    spectral : bool, default=True
        Use the one-SVD route (module Notes) for batches that share one ``s`` and one common
        noise level; ``False`` always factorises per row (kept as an independent check).
    reduce : bool, default=True
        With more readings than coefficients, work on the coefficient-space reduction
        (:meth:`_reduce`) for rows with one noise level; ``False`` keeps the ``m x m``
        data-space route (an independent check on small problems).

    Notes
    -----
    All methods take arrays of hyperparameters of shape ``(n_batch,)`` and row noise
    variances (whitened units) of shape ``(n_batch, m)`` and work on the whole batch at once.
    See the module Notes for the formulas.
    """

    def __init__(self, problem, *, mean_scale=MEAN_SCALE, spectral=True, reduce=True):
        self.problem = problem
        self.mean_scale = float(mean_scale)
        self.spectral = bool(spectral)
        self.reduce = bool(reduce)
        self._spectra = {}
        w = problem.weights
        self.w = w
        self.log_w = float(np.sum(np.log(w)))
        self.Gw = w[:, None] * problem.G
        self.yw = w * problem.y
        self.m, self.p = self.Gw.shape
        deg = np.asarray(problem.degrees)
        self.broad = deg == 0
        self.eig = np.asarray(problem.eigenvalues, float)
        self.G0 = self.Gw[:, self.broad]
        # Group the other columns by degree: K_n = sum over columns of degree n of g g^T
        # (m x m each; built only when the data-space route is used, see K).
        udeg = np.unique(deg[~self.broad])
        self.udeg = udeg
        self.ueig = np.array([self.eig[deg == n][0] for n in udeg])
        self._log1p_ueig = np.log1p(self.ueig)
        self._K2 = None
        self._reduced = None
        self._factor = None

    @property
    def K(self):
        """Data-space blocks :math:`K_n`, shape (n_degrees, m, m) (formed when first asked)."""
        return self._data_space()[0]

    def _data_space(self):
        if self._K2 is None:
            deg = np.asarray(self.problem.degrees)
            K = np.stack([self.Gw[:, deg == n] @ self.Gw[:, deg == n].T for n in self.udeg]) \
                if self.udeg.size else np.zeros((0, self.m, self.m))
            self._K = K
            self._K2 = np.ascontiguousarray(K.reshape(len(self.udeg), self.m * self.m))
        return self._K, self._K2

    def _reduce(self, design, noise_var):
        r"""Return the coefficient-space model for this batch, or None.

        With more readings than coefficients, no per-draw design and one noise level per row,
        :math:`\tilde G = QR` (:func:`~invert.stages._spectrum.triangular_factor`) turns the
        readings into ``p`` pseudo-readings :math:`z = Q^\top\tilde y` with design :math:`R`:
        the posterior of the coefficients is the same (it depends on the data only through
        :math:`\tilde G^\top\tilde G = R^\top R` and :math:`\tilde G^\top\tilde y =
        R^\top z`), and the log density differs by the part :math:`\rho^2 =
        \|\tilde y - QQ^\top\tilde y\|^2` outside the range (see :meth:`loglik`). Memory and
        time are then linear in ``m`` (one pass for the factor).
        """
        if not self.reduce or design is not None or self.m <= self.p:
            return None
        if not np.all(noise_var == noise_var[:, :1]):
            return None
        if self._reduced is None:
            from ...problem import LinearProblem

            R, z, rho2 = triangular_factor(self.problem.G, self.w, np.ones(self.p),
                                           self.problem.y)
            red = LinearProblem(R, z, None, self.problem.degrees, self.problem.eigenvalues)
            self._reduced = CollapsedModel(red, mean_scale=self.mean_scale,
                                           spectral=self.spectral, reduce=False)
            self._factor = (R, z, rho2)
        return self._reduced

    # --- prior ------------------------------------------------------------------------------
    def prior_var(self, tau, s):
        """Prior variance of every coefficient, shape (n_batch, p)."""
        tau = np.atleast_1d(tau)
        s = np.atleast_1d(s)
        v = (1.0 + self.eig[None, :]) ** (-s[:, None])
        v = np.where(self.broad[None, :], self.mean_scale**2, v)
        return tau[:, None] ** 2 * v

    def _batch(self, tau, s, noise_var):
        """Hyperparameter rows as arrays: ``(tau, s, n_batch, noise_var of shape (n_batch, m))``."""
        tau = np.atleast_1d(np.asarray(tau, float))
        s = np.atleast_1d(np.asarray(s, float))
        nb = tau.size
        noise_var = np.broadcast_to(np.asarray(noise_var, float).reshape(nb, -1), (nb, self.m))
        return tau, s, nb, noise_var

    def _spectrum(self, s, noise_var, design):
        """Return the cached one-SVD decomposition for a batch.

        The cached one-SVD decomposition for this batch, or None when the batch does not
        share one ``s`` and one common noise level (or has its own designs).
        """
        if not self.spectral or design is not None or s.size == 0:
            return None
        if not (np.all(s == s[0]) and np.all(noise_var == noise_var[:, :1])):
            return None
        key = float(s[0])
        hit = self._spectra.get(key)
        if hit is None:
            d = np.sqrt(self.prior_var(np.ones(1), s[:1])[0])  # includes the broad mean level
            U, S, Vt = np.linalg.svd(standard_form(self.problem.G, self.w, d),
                                     full_matrices=False)
            # All min(m, p) singular values are kept, with no rank cut-off (rank_mask): the
            # broad mean level (sd 1e4 tau) lifts the largest far above the rest, so the
            # cut-off would drop small directions and change the results at 1e-8 on the demo
            # data. None is needed: every component enters as tau^2 S^2 + nu^2 > 0.
            beta = U.T @ self.yw
            full = U.shape[1] == self.m  # U square: no residual outside its span
            perp = 0.0 if full else float(np.sum((self.yw - U @ beta) ** 2))
            hit = dict(d=d, U=U, S2=S**2, S=S, Vt=Vt, beta=beta, perp=perp, full=full,
                       n_out=self.m - U.shape[1])
            if len(self._spectra) >= 16:
                self._spectra.clear()
            self._spectra[key] = hit
        return hit

    def _spectral_diag(self, sp, tau, nv):
        """``tau^2 S^2 + nu^2`` per row and component, shape (n_batch, r)."""
        return (tau**2)[:, None] * sp["S2"][None, :] + nv[:, None]

    def _blocks(self, tau, s, noise_var, design, chunk):
        r"""Yield the data-space blocks per chunk of hyperparameter rows.

        Yield ``(slice, prior_var, G_r, g_0, B)`` per chunk of hyperparameter rows, with
        :math:`B = G_r P_r G_r^\top + \operatorname{diag}(noise)` (whitened rows; ``G_r`` the
        columns with a proper prior, ``g_0`` the broad mean level).
        """
        br = self.broad
        idx = np.arange(self.m)
        for a0 in range(0, tau.size, chunk):
            sl = slice(a0, a0 + chunk)
            b = tau[sl].size
            pv = self.prior_var(tau[sl], s[sl])
            Gw = np.broadcast_to(self.Gw, (b, self.m, self.p)) if design is None else \
                self.w[None, :, None] * design[sl]
            Gr, g0 = Gw[:, :, ~br], Gw[:, :, br]
            B = (Gr * pv[:, None, ~br]) @ np.swapaxes(Gr, 1, 2)
            B[:, idx, idx] += noise_var[sl]
            yield sl, pv, Gr, g0, B

    # --- marginal likelihood -----------------------------------------------------------------
    def _B(self, tau, s, noise_var):
        m = self.m
        shape = np.exp(-s[:, None] * self._log1p_ueig[None, :])  # (1 + lambda_n)^-s
        B = (shape * (tau**2)[:, None]) @ self._data_space()[1]  # (nb, m*m)
        B[:, :: m + 1] += noise_var
        return B.reshape(-1, m, m)

    def loglik(self, tau, s, noise_var, design=None):
        """Log density of the readings (own units), shape (n_batch,).

        Parameters
        ----------
        tau, s : ndarray of shape (n_batch,)
        noise_var : ndarray of shape (n_batch, m) or (n_batch, 1)
            Whitened noise variance of each row (``k**2`` or ``nu**2``; larger for rows
            taken as faulty).
        design : ndarray of shape (n_batch, m, p), optional
            Per-draw unwhitened design (sensor-angle model); default the problem's ``G``.
        """
        tau, s, nb, noise_var = self._batch(tau, s, noise_var)
        sp = self._spectrum(s, noise_var, design)
        if sp is not None:
            nv = noise_var[:, 0]
            dk = self._spectral_diag(sp, tau, nv)
            logdet = np.sum(np.log(dk), axis=1) + sp["n_out"] * np.log(nv)
            quad = np.sum(sp["beta"] ** 2 / dk, axis=1) + sp["perp"] / nv
            return -0.5 * (quad + logdet + self.m * _LOG2PI) + self.log_w
        red = self._reduce(design, noise_var)
        if red is not None:
            # log N(y~ | 0, C) = log N(z | 0, C_R) - (rho^2/nu^2 + (m-p) log(2 pi nu^2)) / 2.
            nv = noise_var[:, 0]
            n_out = self.m - self.p
            rest = self._factor[2] / nv + n_out * (np.log(nv) + _LOG2PI)
            return red.loglik(tau, s, nv[:, None]) - 0.5 * rest + self.log_w
        if design is None:
            B = self._B(tau, s, noise_var)
            G0 = np.broadcast_to(self.G0, (nb,) + self.G0.shape)
        else:
            Gw = self.w[None, :, None] * design
            v = self.prior_var(tau, s)[:, ~self.broad]
            A = Gw[:, :, ~self.broad] * np.sqrt(v)[:, None, :]
            B = A @ np.swapaxes(A, 1, 2)
            idx = np.arange(self.m)
            B[:, idx, idx] += noise_var
            G0 = Gw[:, :, self.broad]
        V0 = (self.mean_scale * tau) ** 2
        return gaussian_terms(B, self.yw, G0, V0) + self.log_w

    def loo_moments(self, tau, s, noise_var, design=None, chunk=512):
        r"""Compute leave-one-out predictive moments of the readings.

        Leave-one-out predictive mean and variance of each whitened reading given the
        hyperparameters, coefficients integrated out; shapes (n_batch, m).

        Notes
        -----
        For :math:`\tilde y \sim N(0, C)`: :math:`\mu_i = \tilde y_i - [C^{-1}\tilde y]_i /
        [C^{-1}]_{ii}`, :math:`v_i = 1/[C^{-1}]_{ii}` (Sundararajan & Keerthi 2001, Neural
        Comput. 13:1103), with :math:`C^{-1} = B^{-1} - B^{-1}g_0(I/V_0 + g_0^\top B^{-1}
        g_0)^{-1}g_0^\top B^{-1}` (Woodbury). The variance includes the row's noise.
        """
        tau, s, nb, noise_var = self._batch(tau, s, noise_var)
        sp = self._spectrum(s, noise_var, design)
        if sp is not None:
            # C^-1 = U diag(1/d) U^T + (I - U U^T)/nu^2 (the second term vanishes for square U).
            nv = noise_var[:, :1]
            wk = 1.0 / self._spectral_diag(sp, tau, nv[:, 0])
            if not sp["full"]:
                wk = wk - 1.0 / nv
            alpha = (wk * sp["beta"][None, :]) @ sp["U"].T
            dii = wk @ (sp["U"] ** 2).T
            if not sp["full"]:
                alpha = alpha + self.yw[None, :] / nv
                dii = dii + 1.0 / nv
            return self.yw[None, :] - alpha / dii, 1.0 / dii
        if self._reduce(design, noise_var) is not None:
            return self._loo_reduced(tau, s, noise_var[:, 0])
        mu = np.empty((nb, self.m))
        var = np.empty((nb, self.m))
        idx = np.arange(self.m)
        br = self.broad
        for sl, pv, Gr, g0, B in self._blocks(tau, s, noise_var, design, chunk):
            Ci = np.linalg.inv(B)
            if br.any():
                X = Ci @ g0  # B^-1 g0
                S = np.einsum("bmk,bml->bkl", g0, X)
                S[:, np.arange(S.shape[1]), np.arange(S.shape[1])] += 1.0 / pv[:, br]
                Ci = Ci - X @ np.linalg.solve(S, np.swapaxes(X, 1, 2))
            alpha = Ci @ self.yw
            dii = Ci[:, idx, idx]
            mu[sl] = self.yw[None, :] - alpha / dii
            var[sl] = 1.0 / dii
        return mu, var

    def _loo_reduced(self, tau, s, nv, chunk=16, block=2048):
        r"""LOO moments by Woodbury in coefficient space, readings in blocks.

        :math:`C^{-1} = (I - \tilde G S^{-1}\tilde G^\top)/\nu^2` with :math:`S = \nu^2
        P^{-1} + R^\top R` (:math:`P` the prior variances; Woodbury identity), so
        :math:`[C^{-1}]_{ii} = (1 - \|L^{-1}g_i\|^2)/\nu^2` (:math:`S = LL^\top`) and
        :math:`[C^{-1}\tilde y]_i = (\tilde y_i - g_i^\top S^{-1}R^\top z)/\nu^2`.
        """
        R, z, _ = self._factor
        nb = tau.size
        mu = np.empty((nb, self.m))
        var = np.empty((nb, self.m))
        RtR, Rtz = R.T @ R, R.T @ z
        for a0 in range(0, nb, chunk):
            sl = slice(a0, a0 + chunk)
            S = RtR[None] + np.einsum("b,bp,pq->bpq", nv[sl], 1.0 / self.prior_var(tau[sl], s[sl]),
                                      np.eye(self.p))
            L = np.linalg.cholesky(S)
            u = np.linalg.solve(S, np.broadcast_to(Rtz, (len(S), self.p))[:, :, None])[:, :, 0]
            for r0 in range(0, self.m, block):
                rs = slice(r0, r0 + block)
                Gb = self.Gw[rs]
                X = np.linalg.solve(L, np.broadcast_to(Gb.T, (len(S),) + Gb.T.shape))
                dii = (1.0 - np.sum(X**2, axis=1)) / nv[sl, None]
                alpha = (self.yw[None, rs] - u @ Gb.T) / nv[sl, None]
                mu[sl, rs] = self.yw[None, rs] - alpha / dii
                var[sl, rs] = 1.0 / dii
        return mu, var

    def loo_loglik(self, tau, s, noise_var, design=None):
        """``log p(y_i | y_-i, hyperparameters)`` of each reading in its own units, (n_batch, m)."""
        mu, var = self.loo_moments(tau, s, noise_var, design)
        return (-0.5 * (_LOG2PI + np.log(var) + (self.yw[None, :] - mu) ** 2 / var)
                + np.log(self.w)[None, :])

    # --- conditional posterior of the coefficients -------------------------------------------
    def conditional(self, tau, s, noise_var, rng=None, design=None, chunk=512):
        r"""Posterior mean and one exact draw of the coefficients per hyperparameter row.

        Returns
        -------
        mean, draw : ndarray of shape (n_batch, p)

        Notes
        -----
        Data-space form, O(m^2 p) per row. The broad mean level first, from its marginal
        :math:`\tilde y \sim N(g_0 c_0, B)`: precision :math:`1/V_0 + g_0^\top B^{-1}g_0`,
        mean :math:`(\cdot)^{-1} g_0^\top B^{-1}\tilde y`; then the rest given :math:`c_0`
        by Matheron's rule (prior draw :math:`a`, noise draw :math:`e`):
        :math:`c_r = a + P_r G_r^\top B^{-1}(\tilde y - g_0c_0 - G_r a - e)`, exact for the
        Gaussian conditional (Rasmussen & Williams 2006, §2.2; Bishop 2006, eq. 3.53–3.54).
        """
        rng = np.random.default_rng(rng)
        tau, s, nb, noise_var = self._batch(tau, s, noise_var)
        sp = self._spectrum(s, noise_var, design)
        red = None if sp is not None else self._reduce(design, noise_var)
        if red is not None:
            # Same Gaussian conditional on the p pseudo-readings (draws from rng's stream).
            return red.conditional(tau, s, noise_var[:, :1], rng=rng, chunk=min(chunk, 64))
        if sp is not None:
            # Standard form x = c / (tau d): A = (tau/nu) U S V^T, singular values sv.
            sv = sp["S"][None, :] * (tau / np.sqrt(noise_var[:, 0]))[:, None]
            bt = sp["beta"][None, :] / np.sqrt(noise_var[:, :1])
            Vt = sp["Vt"]
            xm = (sv / (sv**2 + 1) * bt) @ Vt
            z = rng.standard_normal((nb, self.p))
            xd = xm + z + ((1 / np.sqrt(sv**2 + 1) - 1) * (z @ Vt.T)) @ Vt
            scale = tau[:, None] * sp["d"][None, :]
            return scale * xm, scale * xd
        br = self.broad
        p0 = int(br.sum())
        z = rng.standard_normal((nb, self.p))
        e = rng.standard_normal((nb, self.m))
        mean = np.empty((nb, self.p))
        draw = np.empty((nb, self.p))
        for sl, pv, Gr, g0, B in self._blocks(tau, s, noise_var, design, chunk):
            b = len(B)
            Pr = pv[:, ~br]
            y = np.broadcast_to(self.yw, (b, self.m))
            if p0:
                rhs = np.concatenate([y[:, :, None], g0], axis=2)
                X = np.linalg.solve(B, rhs)
                prec0 = np.einsum("bmk,bml->bkl", g0, X[:, :, 1:])
                prec0[:, np.arange(p0), np.arange(p0)] += 1.0 / pv[:, br]
                m0 = np.linalg.solve(prec0, np.einsum("bmk,bm->bk", g0, X[:, :, 0])[:, :, None])
                m0 = m0[:, :, 0]
                R = np.linalg.cholesky(prec0)  # prec0 = R R^T; R^-T z has covariance prec0^-1
                c0 = m0 + np.linalg.solve(np.swapaxes(R, 1, 2), z[sl][:, br][:, :, None])[:, :, 0]
                ym = y - np.einsum("bmk,bk->bm", g0, m0)
                yd = y - np.einsum("bmk,bk->bm", g0, c0)
            else:
                ym = yd = y
            ar = np.sqrt(Pr) * z[sl][:, ~br]
            yd = yd - np.einsum("bmk,bk->bm", Gr, ar) - np.sqrt(noise_var[sl]) * e[sl]
            X = np.linalg.solve(B, np.stack([ym, yd], axis=2))
            back = np.einsum("bmk,bmj->bkj", Gr, X) * Pr[:, :, None]
            mean[sl, ~br] = back[:, :, 0]
            draw[sl, ~br] = ar + back[:, :, 1]
            if p0:
                mean[sl, br] = m0
                draw[sl, br] = c0
        return mean, draw

    def conditional_svd(self, tau, s, noise_var, rng=None, design=None, chunk=256):
        """Draw as :meth:`conditional`, through the SVD (an independent check).

        Same as :meth:`conditional` through the SVD of the whitened standard form (slower,
        kept as an independent check).
        """
        rng = np.random.default_rng(rng)
        tau, s, nb, noise_var = self._batch(tau, s, noise_var)
        z = rng.standard_normal((nb, self.p))
        mean = np.empty((nb, self.p))
        draw = np.empty((nb, self.p))
        for a in range(0, nb, chunk):
            sl = slice(a, a + chunk)
            d = np.sqrt(self.prior_var(tau[sl], s[sl]))  # (b, p)
            r = 1.0 / np.sqrt(noise_var[sl])  # (b, m)
            G = self.Gw[None] if design is None else self.w[None, :, None] * design[sl]
            A = standard_form(G, r, d[:, None, :])
            yt = r * self.yw[None, :]
            U, sv, Vt = np.linalg.svd(A, full_matrices=False)
            beta = np.einsum("bmk,bm->bk", U, yt)
            xm = np.einsum("bkp,bk->bp", Vt, sv / (sv**2 + 1) * beta)
            zk = np.einsum("bkp,bp->bk", Vt, z[sl])
            xd = xm + z[sl] + np.einsum("bkp,bk->bp", Vt, (1 / np.sqrt(sv**2 + 1) - 1) * zk)
            mean[sl] = d * xm
            draw[sl] = d * xd
        return mean, draw


def gaussian_terms(B, y, G0, V0):
    r"""``log N(y | 0, B + V0 G0 G0^T)`` for a batch of SPD ``B`` (Woodbury on ``G0``).

    Parameters
    ----------
    B : ndarray of shape (n_batch, m, m)
    y : ndarray of shape (m,)
    G0 : ndarray of shape (n_batch, m, p0)
    V0 : ndarray of shape (n_batch,)
    """
    nb, m, _ = B.shape
    out = np.full(nb, -np.inf)
    try:
        L = np.linalg.cholesky(B)
        good = np.ones(nb, bool)
    except np.linalg.LinAlgError:
        # Rare: factorise one by one and leave the failures at -inf.
        L = np.zeros_like(B)
        good = np.zeros(nb, bool)
        for i in range(nb):
            try:
                L[i] = np.linalg.cholesky(B[i])
                good[i] = True
            except np.linalg.LinAlgError:
                pass
    if not good.any():
        return out
    if not good.all():
        L, G0, V0 = L[good], G0[good], V0[good]
    rhs = np.empty((L.shape[0], m, 1 + G0.shape[2]))
    rhs[:, :, 0] = y
    rhs[:, :, 1:] = G0
    Z = np.linalg.solve(L, rhs)
    zy, Z0 = Z[:, :, 0], Z[:, :, 1:]
    logdet = 2 * np.sum(np.log(np.diagonal(L, axis1=1, axis2=2)), axis=1)
    quad = np.sum(zy**2, axis=1)
    p0 = Z0.shape[2]
    V0g = V0
    if p0 == 1:
        # Scalar Woodbury / determinant lemma for the single mean-level column.
        b = np.sum(Z0[:, :, 0] * zy, axis=1)
        S = np.sum(Z0[:, :, 0] ** 2, axis=1)
        M = 1.0 + V0g * S
        quad = quad - V0g * b**2 / M
        logdet = logdet + np.log(M)
    elif p0:
        b = np.einsum("bmk,bm->bk", Z0, zy)
        S = np.einsum("bmk,bml->bkl", Z0, Z0)
        M = np.eye(p0)[None] + V0g[:, None, None] * S
        sign, ld = np.linalg.slogdet(M)
        quad = quad - V0g * np.einsum("bk,bk->b", b, np.linalg.solve(M, b[:, :, None])[:, :, 0])
        logdet = logdet + ld
    out[good] = -0.5 * (quad + logdet + m * _LOG2PI)
    return out
