r"""Hyperparameter-averaged Gaussian stage: the posterior averaged over ``s`` and ``tau``.

Notes
-----
The Gaussian stage (:mod:`invert.stages.gaussian`) plugs in the evidence-optimal smoothness
order :math:`s` and prior-to-noise ratio :math:`\alpha = \nu^2/\tau^2`. When the truth is not
drawn from one smoothness prior (a step along an arc, a source just outside the rim) the
evidence is flat over a range of :math:`(s, \alpha)` and a single plug-in value is
over-confident exactly where the readings cannot tell those values apart (in gaps and inside).
This stage integrates over them instead (Bayesian model averaging, [1]_ §1–3, with the
evidence of [2]_):

.. math:: p(c\mid y) = \sum_{k} w_k\,N(c;\,\bar c_k, \Sigma_k),\qquad
          w_k \propto p(y\mid s_k, \alpha_k)\,\pi(s_k)\,\pi(\log\alpha_k),

over a grid of :math:`s_k` (uniform prior on the grid :data:`S_GRID` within ``s_bounds``) and
of :math:`\log\alpha` (uniform: the scale-invariant prior on :math:`\tau`, [3]_ §3.2), each
:math:`(\bar c_k, \Sigma_k)` the closed-form posterior of the Gaussian stage. With the noise level
unknown, the profiled evidence equals the marginal over :math:`\nu` under the prior
:math:`1/\nu` up to a constant, so the same weights serve. The estimate is the Gaussian with the
mixture's mean and covariance,

.. math:: \bar c = \sum_k w_k\bar c_k,\qquad
          \Sigma = \sum_k w_k\bigl(\Sigma_k + (\bar c_k - \bar c)(\bar c_k - \bar c)^\top\bigr),

and since every :math:`\Sigma_k` of one :math:`s` shares the singular vectors of that
:math:`s`, the sum costs one :math:`p\times p` product per :math:`s`. Components below
:data:`MIN_WEIGHT` of the largest are dropped.

When the truth lies outside every prior of the grid, the held-out readings say so: the
covariance is then widened by the block cross-validated scale of :mod:`.cv_scale` (never
narrowed; ``info["calibration"]`` records the check and the factor).

References
----------
.. [1] J. A. Hoeting, D. Madigan, A. E. Raftery and C. T. Volinsky, "Bayesian model averaging:
       a tutorial", Statistical Science 14:382–417, 1999. doi:10.1214/ss/1009212519
.. [2] D. J. C. MacKay, "Bayesian interpolation", Neural Computation 4:415–447, 1992.
       doi:10.1162/neco.1992.4.3.415
.. [3] A. Gelman et al., *Bayesian Data Analysis*, 3rd ed., CRC Press, 2013.
"""

from __future__ import annotations

import numpy as np

from ..prior import SmoothnessPrior
from ..problem import Estimate, PriorSummary
from ._blas import single_thread
from ._spectrum import unit_factor
from .cv_scale import block_scale
from .gaussian import GaussianPosterior, evidence_for

__all__ = ["AveragedPosterior", "S_GRID", "MIN_WEIGHT"]

#: Smoothness orders averaged over (those inside ``s_bounds``). Steps of 0.5 up to 3, then 1:
#: the evidence changes slowly with ``s`` above 3.
S_GRID = (1.0, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0)
#: Relative weight below which a component is dropped.
MIN_WEIGHT = 1e-6
#: Points of the ``log alpha`` grid per ``s`` (log-spaced, three decades beyond the
#: informative singular values on each side).
N_ALPHA = 61
#: Residual degrees of freedom a component must keep when the noise level is estimated.
RESIDUAL_DOF_FLOOR = 3.0
#: Default range of ``s`` for this stage: down to 1 (rim profiles of bounded variation; a step
#: along an arc has Fourier coefficients of order 1/n, i.e. a prior sd n^-s with s near 1).
AVERAGED_S_BOUNDS = (1.0, 5.0)


class AveragedPosterior(GaussianPosterior):
    r"""Gaussian posterior averaged over the smoothness order and the prior scale.

    Parameters
    ----------
    noise_sd : float, optional
        Common noise sd for readings without a sigma column; averaged over (scale-invariant
        prior) when None.
    s_bounds : (float, float), default=AVERAGED_S_BOUNDS
        Range of the smoothness orders of :data:`S_GRID` averaged over.
    calibrate : bool, default=True
        Widen the covariance by the block cross-validated scale when the held-out readings
        are predicted worse than the posterior says (:mod:`invert.stages.cv_scale`).

    Attributes
    ----------
    weights_ : ndarray
        Weight of each kept component.
    s_, tau_ : float
        Weighted means of ``s`` and ``log tau`` (the latter exponentiated).

    Notes
    -----
    See the module docstring.
    """

    def __init__(self, *, noise_sd=None, s_bounds=AVERAGED_S_BOUNDS, calibrate=True):
        super().__init__(None, noise_sd=noise_sd, s_bounds=s_bounds)
        self.calibrate = bool(calibrate)

    @classmethod
    def from_settings(cls, *, s=2.0, seed=None, **options):
        """Build the stage from the workflow's settings (``s`` only sized the truncation)."""
        return cls(**options)

    def fit(self, problem) -> Estimate:
        """Average the closed-form posterior over ``(s, log alpha)`` and return the Estimate."""
        with single_thread():
            return self._fit_averaged(problem)

    def _grid(self, problem):
        """Orders of :data:`S_GRID` inside ``s_bounds``.

        Orders rougher than the truncation supports at the domain's tolerance are kept: each
        is a prior on the truncated basis (at s = 1 and 128 harmonics about 1 % of the rim
        variance of the untruncated prior lies beyond the last harmonic), and the averaging
        needs the rough end for steps and near-rim sources.
        """
        lo, hi = self.s_bounds
        grid = [s for s in S_GRID if lo - 1e-9 <= s <= hi + 1e-9]
        return grid or [float(lo)]

    def _components(self, problem, mode, noise):
        """Per ``s``: ``(s, spec, alphas, log evidence, nu_int^2, df)`` on the alpha grid."""
        factor = unit_factor(problem)
        rows = []
        m = problem.n_readings
        for s in self._grid(problem):
            spec = self._spectrum(problem, s, factor)
            ev = evidence_for(spec, mode, None, noise)
            g = spec.alpha_grid(N_ALPHA)
            alphas = np.logspace(np.log10(g[0]) - 3, np.log10(g[-1]) + 3, N_ALPHA)
            logev = np.where(np.isfinite(v := ev(alphas)), v, -np.inf)
            if mode == "profile":
                dof = spec.dof(alphas)
                df = np.maximum(m - dof, 1e-6)
                nu2 = spec.residual2(alphas) / df  # Wahba (1983), as the Gaussian stage
                # An estimated noise level needs residual degrees of freedom: components
                # that nearly interpolate are left out (the Tikhonov stage's guard, 3 dof),
                # unless no component keeps them.
                floor = min(RESIDUAL_DOF_FLOOR, 0.5 * m)
                logev = np.where(df >= floor, logev, -np.inf)
            else:
                df = np.full(alphas.shape, np.inf)
                nu2 = np.full(alphas.shape, float(noise) ** 2)
            tau = ev.hypers(alphas)[0]
            rows.append((s, spec, alphas, logev, nu2, df, tau))
        return rows

    def _fit_averaged(self, problem):
        if problem.n_readings < 2:
            raise ValueError(f"At least 2 readings are needed; got {problem.n_readings}.")
        mode, _, noise = self._mode(problem)
        if mode == "tau":  # pragma: no cover - tau is never fixed here
            raise ValueError("AveragedPosterior averages over tau; it cannot be fixed.")
        rows = self._components(problem, mode, noise)
        top = max(float(np.max(r[3])) for r in rows)
        if not np.isfinite(top):
            raise ValueError(f"No smoothness order and prior scale leaves residual degrees of "
                             f"freedom to estimate the noise level from {problem.n_readings} "
                             f"readings; give a 'sigma' column or add readings")
        weights = [np.exp(r[3] - top) for r in rows]  # relative to the largest
        weights = [np.where(w >= MIN_WEIGHT, w, 0.0) for w in weights]
        norm = sum(float(w.sum()) for w in weights)
        weights = [w / norm for w in weights]
        p = problem.n_coef
        means, ws = [], []
        second = np.zeros((p, p))
        for (s, spec, alphas, logev, nu2, df, tau), w in zip(rows, weights):
            keep = np.flatnonzero(w > 0)
            if keep.size == 0:
                continue
            a, wn = alphas[keep], w[keep] * nu2[keep]
            # Every covariance of this s is B diag(h(alpha)) B^T with one B: sum the weighted
            # h over alpha, then one product (Spectrum.cov_factor gives B and h).
            B, _ = spec.cov_factor(a[0])
            h_kept = (1.0 / (spec.s[:, None] ** 2 + a[None, :])) @ wn
            h_null = np.full(B.shape[1] - spec.s.size, float(np.sum(wn / a)))
            second += (B * np.concatenate([h_kept, h_null])) @ B.T
            f = spec.filter_factors(a)  # means of every kept alpha in one product
            means.append((spec.d[:, None] * (spec.Vt.T @ (f * (spec.beta / spec.s)[:, None]))).T)
            ws.append(w[keep])
        ws = np.concatenate(ws)
        M = np.vstack(means)
        mean = ws @ M
        D = M - mean
        cov = second + (D.T * ws) @ D
        calibration = block_scale(problem, rows, weights) if self.calibrate else None
        if calibration is not None and calibration["factor"] > 1.0:
            cov = cov * calibration["factor"]
        return self._estimate(problem, rows, weights, mean, cov, mode, calibration)

    def _estimate(self, problem, rows, weights, mean, cov, mode, calibration=None):
        s_all = np.concatenate([np.full(len(r[2]), r[0]) for r in rows])
        w_all = np.concatenate(weights)
        tau_all = np.concatenate([r[6] for r in rows])
        df_all = np.concatenate([r[5] for r in rows])
        nu2_all = np.concatenate([r[4] for r in rows])
        lam_all = np.concatenate([r[2] for r in rows])
        s_mean = float(w_all @ s_all)
        tau_mean = float(np.exp(w_all @ np.log(tau_all)))
        known = problem.sigma is not None
        estimated = mode == "profile"
        df = float(w_all @ df_all) if estimated else None
        nu = float(np.sqrt(w_all @ nu2_all))
        self.problem_, self.weights_ = problem, w_all[w_all > 0]
        self.s_, self.tau_ = s_mean, tau_mean
        s_weights = {f"{s:g}": float(w.sum()) for (s, *_), w in zip(rows, weights)}
        order = np.argsort(lam_all)
        cdf = np.cumsum(w_all[order])
        lam_range = [float(lam_all[order][np.searchsorted(cdf, q)]) for q in (0.05, 0.95)]
        info = {
            "method": "averaged",
            "hyperparameters": "evidence-weighted average over the smoothness order s and the "
                               "prior-to-noise ratio (Bayesian model averaging)",
            "s": s_mean,
            "s_weights": s_weights,
            "tau": tau_mean,
            "lam": float(np.exp(w_all @ np.log(lam_all))),
            "lam_90": lam_range,
            "n_components": int(np.sum(w_all > 0)),
            "noise_sd": None if known else nu,
            "noise": "given per reading" if known else (
                "fixed by the user" if mode == "noise" else
                "common level averaged over (prior 1/noise), residual estimate per component"),
            "n_readings": problem.n_readings,
            "n_coefficients": problem.n_coef,
            "n_modes": problem.n_modes,
            "effective_dof": float(w_all @ np.concatenate([r[1].dof(r[2]) for r in rows])),
            "intervals": "Gaussian with the mean and covariance of the averaged posterior"
                         + (" and Student-t quantiles on the weighted residual dof"
                            if estimated else ""),
            "interval_df": df,
            "notes": list(problem.assembly_notes),
            "calibration": calibration,
        }
        info["residual_dof"] = problem.n_readings - info["effective_dof"]
        noise_pred = nu * (float(np.median(problem.sigma)) if known else 1.0)
        shapes = {s: SmoothnessPrior(s=s).shape(problem.eigenvalues, problem.degrees)
                  for s in np.unique(s_all)}
        v_prior = sum(w * t**2 * shapes[s] for w, t, s in zip(w_all, tau_all, s_all) if w > 0)
        return Estimate(mean=mean, cov=cov, domain=problem.domain, method="averaged",
                        noise_sd=noise_pred, df=df, info=info, warnings=tuple(problem.notes),
                        prior=PriorSummary(s=s_mean, tau=tau_mean, variances=v_prior))
