r"""Tikhonov stage: regularised least squares with the smoothness penalty.

Notes
-----
Minimise :math:`\|W(Gc - y)\|^2 + \alpha \sum_j c_j^2 / v_j` with :math:`v_j = (1+\lambda_j)^{-s}`
the prior shape (:mod:`invert.prior`). The parameter :math:`\alpha` (reported as ``lam``) is
chosen by one of the rules below from a single SVD (:class:`~invert.stages._spectrum.Spectrum`):

``gcv``          minimise :math:`V(\alpha) = m\|r\|^2/(m - \operatorname{tr}A)^2` [1]_
``loo``          minimise the leave-one-out mean square :math:`\frac1m\sum (r_i/(1-A_{ii}))^2`
``lcurve``       maximise the curvature of :math:`(\log\|r\|, \log\|x\|)` [2]_
``discrepancy``  largest :math:`\alpha` with :math:`\|r\|^2 \le \tau_d^2 m` [3]_ (known sigma)
``upre``         minimise :math:`\|r\|^2 + 2\operatorname{tr}A - m` (Mallows' :math:`C_p`;
                 known sigma)
``evidence``     maximise the marginal likelihood (type-II ML) [4]_

Every rule (except the evidence with given sigma, a proper likelihood) is restricted to
parameters that leave at least ``min_residual_dof`` residual degrees of freedom,
:math:`m - \operatorname{tr}A`: with the 13–40 readings usual here, GCV and leave-one-out
otherwise often pick a nearly interpolating fit. Intervals come from the
equivalent Gaussian posterior at the chosen :math:`\alpha`: prior sd :math:`\tau = \sigma/
\sqrt\alpha`, noise sd :math:`\sigma` (given, or estimated).

References
----------
.. [1] G. H. Golub, M. Heath and G. Wahba, "Generalized cross-validation as a method for
       choosing a good ridge parameter", Technometrics 21:215–223, 1979.
       doi:10.1080/00401706.1979.10489751
.. [2] P. C. Hansen and D. P. O'Leary, "The use of the L-curve in the regularization of discrete
       ill-posed problems", SIAM J. Sci. Comput. 14:1487–1503, 1993. doi:10.1137/0914086
.. [3] V. A. Morozov, *Methods for Solving Incorrectly Posed Problems*, Springer, 1984, ch. 26.
.. [4] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.5.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import optimize, stats

from ..errors import FitWarning
from ..prior import SmoothnessPrior
from ..problem import Estimate, PriorSummary
from ._search import grid_then_refine
from ._spectrum import Spectrum

__all__ = [
    "Tikhonov",
    "tikhonov",
    "RULES",
    "gcv_score",
    "loo_score",
    "lcurve_curvature",
    "upre_score",
]

RULES = ("evidence", "gcv", "loo", "lcurve", "discrepancy", "upre", "fixed")
_NEEDS_SIGMA = ("discrepancy", "upre")




def gcv_score(spec: Spectrum, alpha):
    r"""GCV function :math:`m\|r\|^2/(m-\operatorname{tr}A)^2` (Golub, Heath & Wahba 1979)."""
    m = spec.m
    return m * spec.residual2(alpha) / (m - spec.dof(alpha)) ** 2


def loo_score(spec: Spectrum, alpha):
    r"""Mean squared leave-one-out residual :math:`\frac1m\sum_i (r_i/(1-A_{ii}))^2`."""
    return spec.loo_mean_square(alpha)


def upre_score(spec: Spectrum, alpha):
    """Unbiased predictive risk (Mallows' C_p) in whitened units: ``||r||^2 + 2 tr A - m``."""
    return spec.residual2(alpha) + 2 * spec.dof(alpha) - spec.m


def lcurve_curvature(spec: Spectrum, alpha):
    r"""Compute the curvature of the L-curve.

    Curvature of the L-curve :math:`(\log\sqrt\rho, \log\sqrt\eta)` at :math:`\lambda =
    \sqrt\alpha`.

    Notes
    -----
    Hansen's closed form with :math:`\eta = \|x_\lambda\|^2`, :math:`\rho = \|r_\lambda\|^2`,
    :math:`\eta' = -\frac4\lambda \sum (1-f_i) f_i^2 \beta_i^2/s_i^2`:

    .. math:: \kappa = -2\frac{\eta\rho}{\eta'}
              \frac{\lambda^2\eta'\rho + 2\lambda\eta\rho + \lambda^4\eta\eta'}
                   {(\lambda^4\eta^2 + \rho^2)^{3/2}}.

    (Hansen, *Discrete Inverse Problems*, SIAM 2010, §5.3.)
    """
    alpha = np.atleast_1d(np.asarray(alpha, dtype=float))
    lam = np.sqrt(alpha)
    f = spec.filter_factors(alpha)
    b2s2 = (spec.beta**2 / spec.s**2)[:, None]
    eta = np.sum(f**2 * b2s2, axis=0)
    rho = spec.residual2(alpha)
    deta = -(4 / lam) * np.sum((1 - f) * f**2 * b2s2, axis=0)
    num = lam**2 * deta * rho + 2 * lam * eta * rho + lam**4 * eta * deta
    return -2 * (eta * rho / deta) * num / (lam**4 * eta**2 + rho**2) ** 1.5


class Tikhonov:
    r"""Regularised least squares with the smoothness penalty and a parameter-choice rule.

    Parameters
    ----------
    rule : {"evidence", "gcv", "loo", "lcurve", "discrepancy", "upre", "fixed"}, default="evidence"
        How to choose the regularisation parameter. ``evidence`` (maximum marginal likelihood)
        is the default because it gave the best-calibrated intervals in the seeded
        simulations of ``bench/calibrate_rules.py`` (figures in the README).
    s : float, default=2.0
        Smoothness order of the penalty (:class:`~invert.prior.SmoothnessPrior`).
    lam : float, optional
        The parameter to use with ``rule="fixed"``.
    noise_sd : float, optional
        With ``rule="fixed"`` and no per-reading sigma: the common noise sd to use instead of
        estimating it (so that a batch run and a single fit agree exactly).
    n_grid : int, default=200
        Number of log-spaced parameter values scanned before refinement.
    min_residual_dof : float, optional
        Smallest residual degrees of freedom allowed. Default: none for the evidence rule with
        given sigma; otherwise ``max(1, 0.1 * m)`` with given sigma and ``max(3, 0.1 * m)`` when
        the noise level is estimated.
    safety : float, default=1.05
        Safety factor :math:`\tau_d` of the discrepancy principle.

    Attributes
    ----------
    lam_ : float
        Chosen parameter.
    grid_, scores_ : ndarray
        The scanned grid and the rule's score on it (for plots).
    noise_sd_ : float
        Noise sd used for intervals (estimated when the readings carry no sigma).
    """

    def __init__(self, rule="evidence", *, s=2.0, lam=None, noise_sd=None, n_grid=200,
                 min_residual_dof=None, safety=1.05):
        self.rule = rule
        self.s = s
        self.lam = lam
        self.noise_sd = noise_sd
        self.n_grid = n_grid
        self.min_residual_dof = min_residual_dof
        self.safety = safety

    @classmethod
    def from_settings(cls, *, s=2.0, seed=None, **options):
        """Build the stage from the assembly layer's settings (:mod:`invert.stages.registry`).

        ``s`` is the penalty order; ``seed`` is unused (nothing here is random).
        """
        return cls(s=s, **options)

    def lowest_s(self):
        """None: the penalty order is fixed and the stage uses the truncation it is given."""
        return None

    def _check(self, problem):
        if self.rule not in RULES:
            raise ValueError(f"The 'rule' parameter of Tikhonov must be one of {RULES}. "
                             f"Got {self.rule!r} instead.")
        if self.rule in _NEEDS_SIGMA and problem.sigma is None:
            raise ValueError(f"The '{self.rule}' rule needs the noise sd of each reading (a "
                             f"'sigma' column); these readings have none. Use 'evidence' or 'gcv'.")
        if self.rule == "fixed" and not (self.lam is not None and self.lam > 0):
            raise ValueError(f"rule='fixed' needs lam > 0. Got {self.lam!r} instead.")
        if problem.n_readings < 2:
            raise ValueError(f"At least 2 readings are needed; got {problem.n_readings}.")

    def fit(self, problem) -> Estimate:
        """Choose the parameter, solve, and return the equivalent Gaussian posterior."""
        self._check(problem)
        prior = SmoothnessPrior(s=self.s)
        spec = Spectrum(problem, np.sqrt(prior.shape(problem.eigenvalues, problem.degrees)))
        m = problem.n_readings
        known = problem.sigma is not None
        min_rdof = self._default_min_rdof(m, known) if self.min_residual_dof is None \
            else self.min_residual_dof
        notes = []

        grid = spec.alpha_grid(self.n_grid)
        self.grid_ = grid
        if self.rule == "fixed":
            alpha = float(self.lam)
            self.scores_ = np.full(grid.shape, np.nan)
        else:
            alpha, self.scores_, guard = self._choose(spec, grid, min_rdof, notes)
        self.lam_ = alpha

        rss = float(spec.residual2(alpha)[0])
        dof = float(spec.dof(alpha)[0])
        if known:
            noise_var = 1.0
        elif self.noise_sd is not None:
            noise_var = float(self.noise_sd) ** 2
        else:
            # Wahba (1983): sigma^2 = rss / (m - tr A), with Student-t intervals on m - tr A
            # degrees of freedom. Plain plug-in Gaussian intervals under-covered (about 81 % for
            # a nominal 90 %) in bench/calibrate_rules.py; these reach about 90 %.
            noise_var = rss / max(m - dof, 1e-12)
        if noise_var <= 0 or not np.isfinite(noise_var):
            notes.append("the residual is zero, so the noise level cannot be estimated; intervals "
                         "are not meaningful. Give a 'sigma' column.")
            noise_var = np.finfo(float).tiny
        self.noise_sd_ = float(np.sqrt(noise_var)) if not known else float(np.median(problem.sigma))

        coef = spec.coef(alpha)
        cov = spec.cov(alpha, noise_var)
        t_df = None if (known or self.noise_sd is not None) else float(max(m - dof, 1e-6))
        if t_df is not None and t_df <= 2:
            notes.append(f"only {t_df:.2g} residual degrees of freedom are left to estimate the "
                         f"noise level; intervals are very wide. Give a 'sigma' column or add "
                         f"readings")
        chi2 = rss / noise_var
        rdof = m - dof
        info = {
            "method": "tikhonov",
            "rule": self.rule,
            "lam": alpha,
            "s": self.s,
            "tau": float(np.sqrt(noise_var / alpha)),
            "noise_sd": self.noise_sd_ if not known else None,
            "noise": "given per reading" if known else (
                "fixed by the user" if self.noise_sd is not None else
                "estimated from the residual, rss / (m - dof) (Wahba 1983)"),
            "n_readings": m,
            "n_coefficients": problem.n_coef,
            "effective_dof": dof,
            "residual_dof": rdof,
            "chi2": chi2,
            "log_evidence": float(spec.log_evidence(alpha, known or self.noise_sd is not None)[0])
            if self.noise_sd is None else None,
            "intervals": "equivalent Gaussian posterior at the chosen lam (prior sd tau = "
                         "noise_sd/sqrt(lam)); Student-t on the residual dof when the noise "
                         "level is estimated" if t_df else "equivalent Gaussian posterior at "
                         "the chosen lam (prior sd tau = noise_sd/sqrt(lam))",
            "interval_df": t_df,
        }
        if known:
            # Chi-square goodness of fit with m - tr A degrees of freedom (common practice for
            # linear smoothers; Hansen 2010 §5.2).
            info["chi2_pvalue"] = float(stats.chi2.sf(chi2, max(rdof, 1e-9)))
        for n in notes:
            warnings.warn(n, FitWarning, stacklevel=2)
        return Estimate(
            mean=coef, cov=cov, domain=problem.domain, method="tikhonov",
            noise_sd=self.noise_sd_, df=t_df, info=info,
            warnings=tuple(problem.notes) + tuple(notes),
            prior=PriorSummary(s=info["s"], tau=info["tau"]),
        )

    def _default_min_rdof(self, m, known):
        # With the noise sd given, the evidence is a proper likelihood for tau alone and needs
        # no guard: on a spherical shell, where unresolved degrees make every data direction
        # signal-dominated, a guard forced over-smoothing and 70 % coverage, and on the disk it
        # never bound (bench/calibrate_rules.py). Every other case keeps 10 % of the readings as
        # residual dof, and at least 3 when the noise level is estimated, so that the Student-t
        # interval has a finite variance (common practice).
        if known and self.rule == "evidence":
            return 0.0
        return max(1.0 if known else 3.0, 0.1 * m)

    def _choose(self, spec, grid, min_rdof, notes):
        m = spec.m
        rule = self.rule
        ok = (m - spec.dof(grid)) >= min_rdof
        if not ok.any():
            notes.append(f"even the strongest smoothing leaves fewer than {min_rdof:.3g} residual "
                         f"degrees of freedom; the fit interpolates the readings")
            ok[:] = True
        if rule == "discrepancy":
            return self._discrepancy(spec, grid, ok, notes)
        score_fn, sign = {
            "gcv": (gcv_score, 1.0),
            "loo": (loo_score, 1.0),
            "upre": (upre_score, 1.0),
            "lcurve": (lcurve_curvature, -1.0),
            "evidence": (lambda sp, a: sp.log_evidence(a, sp.problem.sigma is not None), -1.0),
        }[rule]
        scores = score_fn(spec, grid)
        obj = np.where(ok & np.isfinite(scores), sign * scores, np.inf)
        i = int(np.argmin(obj))
        guard = not ok.all() and i == int(np.flatnonzero(ok)[0])
        uncon = int(np.nanargmin(np.where(np.isfinite(scores), sign * scores, np.inf)))
        if guard and uncon != i:
            notes.append(
                f"the '{rule}' rule preferred a nearly interpolating fit (effective dof "
                f"{spec.dof(grid[uncon])[0]:.1f} of {m} readings); the parameter was limited to "
                f"leave {min_rdof:.3g} residual degrees of freedom")
        if i in (0, len(grid) - 1) and not guard:
            notes.append(f"the '{rule}' rule chose the end of the search range (lam = "
                         f"{grid[i]:.3g}); the data may hold too little information for it")
            return float(grid[i]), scores, guard

        def f(la):
            a = np.exp(la)
            if (m - spec.dof(a)[0]) < min_rdof:
                return np.inf
            return float(sign * score_fn(spec, a)[0])

        # Refine in log(lam) between the neighbours of the best grid point.
        x, _, j, refined = grid_then_refine(f, np.log(grid), xatol=1e-6, values=obj,
                                            full_output=True)
        alpha = float(np.exp(x)) if refined else float(grid[j])
        return alpha, scores, guard

    def _discrepancy(self, spec, grid, ok, notes):
        target = self.safety**2 * spec.m
        rss = spec.residual2(grid)
        scores = rss - target
        if rss[ok][0] > target:
            notes.append(f"the discrepancy principle cannot be met: even the weakest allowed "
                         f"smoothing leaves chi2 = {rss[ok][0]:.3g} > {target:.3g}; the stated "
                         f"sigma may be too small or the model may not fit")
            return float(grid[ok][0]), scores, False
        if rss[-1] <= target:
            notes.append("the discrepancy principle is met even by the strongest smoothing; "
                          "the stated sigma may be too large")
            return float(grid[-1]), scores, False
        j = int(np.flatnonzero(rss > target)[0])
        la = optimize.brentq(lambda x: spec.residual2(np.exp(x))[0] - target,
                             np.log(grid[j - 1]), np.log(grid[j]), xtol=1e-10)
        return float(np.exp(la)), scores, False


def tikhonov(problem, rule="evidence", **kwargs) -> Estimate:
    """One-call form of :class:`Tikhonov`: ``Tikhonov(rule, **kwargs).fit(problem)``."""
    return Tikhonov(rule, **kwargs).fit(problem)
