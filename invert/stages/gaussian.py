r"""Gaussian stage: the closed-form posterior of the coefficients.

Gaussian stage: the closed-form posterior of the coefficients at evidence-optimal
hyperparameters.

Notes
-----
Model: :math:`y = Gc + e`, :math:`e_i \sim N(0, \nu^2\sigma_i^2)` (given sigma; :math:`\nu = 1`
unless ``fit_noise_scale``) or :math:`N(0, \nu^2)` (no sigma: :math:`\nu` is the common noise
sd), and :math:`c_j \sim N(0, \tau^2 (1+\lambda_j)^{-s})` with a broad mean level
(:mod:`invert.prior`). In standard form (:class:`~invert.stages._spectrum.Spectrum`, one SVD
:math:`\tilde A = U\operatorname{diag}(s_i)V^\top` per smoothness :math:`s`) with
:math:`\alpha = \nu^2/\tau^2` the log evidence is

.. math:: \log p(y\mid\tau,s,\nu) = -\tfrac12\Bigl(\frac{q(\alpha)}{\nu^2}
          + m\log\nu^2 + \sum_i\log(1+s_i^2/\alpha) + m\log 2\pi\Bigr) + \sum_i\log w_i,
          \qquad q(\alpha) = \sum_i\frac{\beta_i^2}{1+s_i^2/\alpha} + \|\tilde y_\perp\|^2,

[1]_ (eqs. 3.86) [2]_. A free :math:`\nu` is profiled out exactly, :math:`\hat\nu^2 = q/m`;
the rest is maximised numerically over :math:`\log\alpha` (grid, then bounded Brent) and
:math:`s` (grid over ``s_bounds``, then bounded Brent) — type-II maximum likelihood. The
posterior at the optimum is :math:`N(\bar c, \Sigma)` with (Bishop 2006, eqs. 3.53–3.54)

.. math:: \Sigma = (\Sigma_p^{-1} + G^\top\Sigma_e^{-1}G)^{-1},\qquad
          \bar c = \Sigma G^\top \Sigma_e^{-1} y.

When the noise level is estimated, the intervals use the residual estimate
:math:`\tilde\nu^2 = \|r\|^2/(m - \operatorname{tr}A)` and Student-t quantiles on
:math:`m - \operatorname{tr}A` degrees of freedom [3]_ (the ML value :math:`\hat\nu`, biased low
when :math:`\alpha` and :math:`s` are estimated from the same readings, gave 79–82 % coverage
for nominal 90 % in seeded simulations); both are reported.

References
----------
.. [1] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.3, §3.5.
.. [2] D. J. C. MacKay, "Bayesian interpolation", Neural Computation 4:415–447, 1992.
       doi:10.1162/neco.1992.4.3.415
.. [3] G. Wahba, "Bayesian 'confidence intervals' for the cross-validated smoothing spline",
       J. R. Stat. Soc. B 45:133–150, 1983. doi:10.1111/j.2517-6161.1983.tb01239.x
"""

from __future__ import annotations

import warnings

import numpy as np

from ..errors import FitWarning
from ..prior import SmoothnessPrior
from ..problem import Estimate, PriorSummary
from ._blas import single_thread
from ._checks import check_positive, check_s_bounds
from ._search import grid_then_refine
from ._spectrum import Spectrum, unit_factor

__all__ = ["GaussianPosterior", "gaussian_posterior", "evidence_for", "DEFAULT_S_BOUNDS"]

_LOG2PI = float(np.log(2 * np.pi))

#: Range searched for the smoothness order on the disk. s > 1 gives continuous rim profiles
#: (Matérn nu = s - 1/2 > 1/2, Borovitskiy et al. 2020); below 1.5 the prior needs more than
#: 99 harmonics to keep the truncated share of rim variance under 1e-4
#: (invert.prior.truncation_degree), and above 5 it is as smooth as the 13-40 readings usual
#: here can tell apart.
DEFAULT_S_BOUNDS = (1.5, 5.0)


def truncation_warning(problem, s):
    """Return the warning of a stage held at an ``s`` its problem's truncation cannot keep."""
    return (f"the truncation degree ({problem.n_modes} harmonics) leaves more than the "
            f"domain's tolerance of the prior rim variance out at s = {s:g}. Use more "
            f"harmonics")


class _Evidence:
    """Log evidence over ``log alpha`` for one ``s``, in one of three noise modes."""

    def __init__(self, spec, mode, tau=None, noise=None):
        self.spec, self.mode, self.tau, self.noise = spec, mode, tau, noise

    def hypers(self, alpha):
        """``(tau, nu)`` implied by ``alpha`` (arrays)."""
        alpha = np.atleast_1d(np.asarray(alpha, float))
        quad, _ = self.spec.quad_and_logdet(alpha)
        if self.mode == "profile":
            nu2 = quad / self.spec.m
        elif self.mode == "tau":  # tau fixed, noise free
            nu2 = alpha * self.tau**2
        else:  # noise fixed
            nu2 = np.full(alpha.shape, self.noise**2)
        return np.sqrt(nu2 / alpha), np.sqrt(nu2)

    def __call__(self, alpha):
        alpha = np.atleast_1d(np.asarray(alpha, float))
        quad, logdet = self.spec.quad_and_logdet(alpha)
        _, nu = self.hypers(alpha)
        m = self.spec.m
        return -0.5 * (quad / nu**2 + m * np.log(nu**2) + logdet + m * _LOG2PI) + self.spec.log_w


def evidence_for(spec, mode, tau=None, noise=None):
    """Log evidence over ``alpha`` for one :class:`~invert.stages._spectrum.Spectrum`.

    ``mode`` is ``"profile"`` (common noise level profiled out), ``"tau"`` (``tau`` fixed) or
    ``"noise"`` (noise level ``noise`` fixed; 1 with given sigmas). The returned callable maps
    an array of ``alpha`` to log evidence and has ``hypers(alpha) -> (tau, nu)``.
    """
    return _Evidence(spec, mode, tau, noise)


def _maximise_log(fun, grid):
    """Maximise ``fun`` over a positive scalar.

    Maximise ``fun`` over a positive scalar: log grid, then bounded Brent in ``log x``
    (:func:`~invert.stages._search.grid_then_refine`, no refinement at the grid's ends).
    Returns ``(x, value, at_edge)``.
    """
    vals = fun(grid)
    vals = np.where(np.isfinite(vals), vals, -np.inf)
    x, fx, i, refined = grid_then_refine(lambda la: -float(fun(np.exp(la))[0]), np.log(grid),
                                         xatol=1e-7, values=-vals, refine_at_edge=False,
                                         full_output=True)
    if refined:
        return float(np.exp(x)), -fx, False
    return float(grid[i]), float(vals[i]), i in (0, len(grid) - 1)


class GaussianPosterior:
    r"""Closed-form Gaussian posterior with hyperparameters set by type-II maximum likelihood.

    Parameters
    ----------
    s : float, optional
        Smoothness order of the prior; chosen by maximum evidence within ``s_bounds`` when
        None (default).
    tau : float, optional
        Prior scale (field units); chosen by maximum evidence when None.
    noise_sd : float, optional
        Common noise sd, for readings without a sigma column; estimated when None.
    fit_noise_scale : bool, default=False
        With given sigmas, also estimate a common factor :math:`\nu` multiplying them.
    s_bounds : (float, float), default=DEFAULT_S_BOUNDS
        Search range of ``s``. The assembly layer (:func:`invert.workflow.problem_for_stage`)
        sizes the truncation for its lower end (:meth:`lowest_s`); given fewer harmonics, the
        stage raises the lower end instead, with a warning.
    n_grid : int, default=120
        Size of the ``log alpha`` grid scanned before refinement.

    Attributes
    ----------
    s_, tau_, noise_sd_, lam_ : float
        Chosen hyperparameters (``noise_sd_`` is the noise scale factor with given sigma,
        ``lam_ = noise**2 / tau**2`` in whitened units).
    log_evidence_ : float
        Log marginal likelihood at the optimum.
    problem_ : LinearProblem
        The problem solved.

    Notes
    -----
    See the module docstring for the formulas.

    References
    ----------
    .. [1] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.5.

    Examples
    --------
    >>> import numpy as np
    >>> from invert import Disk, LinearProblem
    >>> d = Disk(1.0, (0, 0), 8)
    >>> th = np.linspace(0, 2 * np.pi, 24, endpoint=False)
    >>> pts = d.from_polar(1.0, th)
    >>> y = 20 + np.cos(th) + 0.01 * np.sin(3 * th)
    >>> prob = LinearProblem(d.design(pts), y, np.full(24, 0.01), d.degrees, d.eigenvalues,
    ...                      d, points=pts)
    >>> from invert.workflow import fit_stage  # sizes the truncation for s = 2
    >>> est = fit_stage(GaussianPosterior(s=2.0), prob)
    >>> round(float(est.at([[0.0, 0.0]]).mean[0]), 2)
    20.0
    """

    def __init__(self, s=None, *, tau=None, noise_sd=None, fit_noise_scale=False,
                 s_bounds=DEFAULT_S_BOUNDS, n_grid=120):
        self.s = s
        self.tau = tau
        self.noise_sd = noise_sd
        self.fit_noise_scale = fit_noise_scale
        self.s_bounds = s_bounds
        self.n_grid = n_grid

    @classmethod
    def from_settings(cls, *, s=2.0, seed=None, fix_s=False, **options):
        """Build the stage from the assembly layer's settings (:mod:`invert.stages.registry`).

        ``s`` is held fixed only with ``fix_s=True`` (otherwise it only sized the truncation
        and the stage estimates it within ``s_bounds``); ``seed`` is unused.
        """
        return cls(s if fix_s else None, **options)

    def lowest_s(self):
        """Return the roughest smoothness order the stage tries.

        The roughest smoothness order tried: ``s`` when fixed, else the lower end of
        ``s_bounds`` (the assembly layer sizes the truncation for it).
        """
        if self.s is None:
            return check_s_bounds(self.s_bounds, "GaussianPosterior")[0]
        SmoothnessPrior(s=float(self.s))  # validates s
        return float(self.s)

    def _mode(self, problem):
        where = "GaussianPosterior"
        tau = check_positive(self.tau, "tau", where)
        noise = check_positive(self.noise_sd, "noise_sd", where)
        if problem.sigma is not None:
            if noise is not None:
                raise ValueError("The 'noise_sd' parameter of GaussianPosterior applies to "
                                 "readings without sigma; these readings carry sigma. Use "
                                 "fit_noise_scale=True instead.")
            noise = None if self.fit_noise_scale else 1.0
        if noise is not None:
            return "noise", tau, noise
        if tau is not None:
            return "tau", tau, None
        return "profile", None, None

    def _spectrum(self, problem, s, factor=None):
        prior = SmoothnessPrior(s=s)
        return Spectrum(problem, np.sqrt(prior.shape(problem.eigenvalues, problem.degrees)),
                        factor=factor)

    def _best_at(self, problem, s, mode, tau, noise, factor=None):
        spec = self._spectrum(problem, s, factor)
        ev = _Evidence(spec, mode, tau, noise)
        if mode == "noise" and tau is not None:
            alpha = noise**2 / tau**2
            return alpha, float(ev(alpha)[0]), False, spec, ev
        grid = spec.alpha_grid(self.n_grid)
        # Widen the grid: the evidence may sit beyond the informative singular values.
        grid = np.logspace(np.log10(grid[0]) - 4, np.log10(grid[-1]) + 4, self.n_grid)
        alpha, val, edge = _maximise_log(ev, grid)
        return alpha, val, edge, spec, ev

    def fit(self, problem) -> Estimate:
        """Choose the hyperparameters and return the Gaussian posterior as an Estimate."""
        with single_thread():
            return self._fit(problem)

    def _choose_s(self, problem, mode, tau, noise, notes, factor=None):
        """Choose the smoothness order; return ``(s, best)``.

        ``s`` is the fixed order, or the one of maximum evidence within ``s_bounds`` (grid,
        then bounded Brent), and ``best`` is :meth:`_best_at` there. ``factor`` (the problem's
        :func:`~invert.stages._spectrum.unit_factor`) serves every ``s`` tried.
        """
        if self.s is not None:
            s_hat = float(self.s)
            SmoothnessPrior(s=s_hat)  # validates s
            if not problem.truncation_holds(s_hat):
                notes.append(truncation_warning(problem, s_hat))
            return s_hat, self._best_at(problem, s_hat, mode, tau, noise, factor)
        lo, hi = check_s_bounds(self.s_bounds, "GaussianPosterior")
        floor = problem.truncation_floor(lo, hi)
        if floor > lo:
            notes.append(f"the truncation degree supports s >= {floor:.3g} only; the "
                         f"search range of s was raised from {lo:g}. Use more harmonics")
            lo = floor
        cache = {}

        def neg(s):
            if s not in cache:
                cache[s] = self._best_at(problem, s, mode, tau, noise, factor)
            return -cache[s][1]

        s_hat, _ = grid_then_refine(neg, np.linspace(lo, hi, 9), xatol=1e-4)
        neg(s_hat)
        if s_hat - lo < 1e-3 * (hi - lo) or hi - s_hat < 1e-3 * (hi - lo):
            notes.append(f"the evidence is largest at the end of the smoothness range "
                         f"(s = {s_hat:.3g} in [{lo:g}, {hi:g}])")
        return s_hat, cache[s_hat]

    def _fit(self, problem):
        if problem.n_readings < 2:
            raise ValueError(f"At least 2 readings are needed; got {problem.n_readings}.")
        mode, tau, noise = self._mode(problem)
        notes = []
        notes_info = list(problem.assembly_notes)
        s_hat, best = self._choose_s(problem, mode, tau, noise, notes, unit_factor(problem))
        alpha, log_ev, edge, spec, ev = best
        if edge:
            notes.append(f"the evidence is largest at the end of the search range of the "
                         f"prior-to-noise ratio (lam = {alpha:.3g}); the data may hold too "
                         f"little information to set it")
        tau_hat, nu_hat = (float(v[0]) for v in ev.hypers(alpha))
        self.problem_ = problem
        self.s_, self.tau_, self.noise_sd_, self.lam_ = s_hat, tau_hat, nu_hat, alpha
        self.log_evidence_ = log_ev
        m = problem.n_readings
        coef = spec.coef(alpha)
        known = problem.sigma is not None
        estimated_noise = mode in ("profile", "tau")
        rss = float(spec.residual2(alpha)[0])
        dof = float(spec.dof(alpha)[0])
        nu_int = nu_hat
        df = None
        if estimated_noise:
            # Intervals: residual noise estimate rss / (m - tr A) with Student-t on m - tr A
            # degrees of freedom (Wahba 1983), as in the Tikhonov stage. With the plug-in ML
            # noise level and Gaussian (or t_m) intervals, seeded simulations with truth from
            # the prior covered 79-82 % for a nominal 90 %; this reaches about 87-90 %.
            df = float(max(m - dof, 1e-6))
            nu_int = float(np.sqrt(rss / df)) if rss > 0 else nu_hat
            if df <= 2:
                notes.append(f"only {df:.2g} residual degrees of freedom are left to estimate "
                             f"the noise level; intervals are very wide. Give a 'sigma' column "
                             f"or add readings")
        cov = spec.cov(alpha, nu_int**2)
        noise_pred = nu_int * (float(np.median(problem.sigma)) if known else 1.0)
        info = {
            "method": "gaussian",
            "hyperparameters": "type-II maximum likelihood (maximum evidence)",
            "s": s_hat,
            "s_bounds": [float(v) for v in self.s_bounds] if self.s is None else None,
            "tau": tau_hat,
            "noise_sd": None if known else nu_hat,
            "noise_scale": nu_hat if known else None,
            "noise": ("given per reading" if known and not self.fit_noise_scale else
                      "given per reading, times a common factor set by maximum evidence"
                      if known else ("fixed by the user" if mode == "noise" else
                                     "common level set by maximum evidence")),
            "lam": alpha,
            "log_evidence": log_ev,
            "n_readings": m,
            "n_coefficients": problem.n_coef,
            "n_modes": problem.n_modes,
            "effective_dof": dof,
            "residual_dof": m - dof,
            "chi2": rss / nu_hat**2,
            "interval_noise_sd": nu_int if estimated_noise else None,
            "intervals": ("Gaussian posterior at the chosen tau and s with the noise level "
                          "rss / (m - dof) and Student-t on m - dof degrees of freedom "
                          "(Wahba 1983)" if df else "Gaussian posterior at the chosen "
                          "hyperparameters"),
            "interval_df": df,
            "notes": notes_info,
        }
        for n in notes:
            warnings.warn(n, FitWarning, stacklevel=2)
        return Estimate(mean=coef, cov=cov, domain=problem.domain, method="gaussian",
                        noise_sd=noise_pred, df=df, info=info,
                        warnings=tuple(problem.notes) + tuple(notes),
                        prior=PriorSummary(s=info["s"], tau=info["tau"]))


def gaussian_posterior(problem, s=None, **kwargs) -> Estimate:
    """One-call form of :class:`GaussianPosterior`: ``GaussianPosterior(s, **kwargs).fit(problem)``.

    See Also
    --------
    GaussianPosterior
    """
    return GaussianPosterior(s, **kwargs).fit(problem)
