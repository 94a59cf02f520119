r"""MCMC stage: posterior draws with uncertain hyperparameters, faulty sensors or sensor angles.

Three models, all returning the same :class:`~invert.problem.Estimate` (with ``draws``):

default
    The hyperparameters :math:`\theta = (\log\tau, s, \log\nu)` are sampled with emcee [1]_
    from :math:`p(\theta\mid y) \propto p(y\mid\theta)p(\theta)`, where the coefficients are
    integrated out analytically (:class:`~invert.stages.mcmc.collapsed.CollapsedModel`); for every
    kept :math:`\theta` the coefficients are then drawn exactly from their Gaussian conditional
    (Bishop 2006, eqs. 3.53–3.54). ``collapsed=False`` instead runs emcee over the
    hyperparameters and all coefficients jointly (the slow baseline of ``bench/bench_mcmc.py``).
faulty sensors (``faulty=True``)
    Each reading is good, :math:`N(y_i\mid g_i^\top c, \nu^2\sigma_i^2)`, or faulty,
    :math:`N(y_i\mid g_i^\top c, \sigma_{bad}^2)`, with fault rate
    :math:`\varepsilon \sim \mathrm{Beta}` (Hogg, Bovy & Lang 2010 [2]_). Sampled by a blocked
    Gibbs scheme (:mod:`invert.stages.mcmc.augmented`).
sensor angle error (``angle_sd_deg``)
    Each sensor's true polar angle is :math:`\phi_i + \delta_i`, :math:`\delta_i \sim N(0,
    \mathrm{sd}^2)`; the sampler integrates over the :math:`\delta_i` (same Gibbs scheme).

Weakly informative priors, stated in ``info["priors"]``: :math:`\log\tau \sim N(\log S_y,
2.5^2)` with :math:`S_y` the sd of the readings; :math:`s \sim U(s_{lo}, s_{hi})`; a common
noise sd :math:`\log\nu \sim N(\log(S_y/10), 3^2)`; a noise scale factor on given sigmas
:math:`\log\nu \sim N(0, 1)`.

Walkers start in a small ball around the posterior mode (each of the ``n_ensembles``
independent ensembles around its own draw from the Laplace approximation there); every ensemble
runs until its chains are at least 50 integrated autocorrelation times long (Sokal window
``c = 5``) or ``max_steps`` is reached; convergence is judged across ensembles by nested R-hat
[3]_. emcee's random stream is derived from ours, so a seed gives the same numbers.

References
----------
.. [1] D. Foreman-Mackey, D. W. Hogg, D. Lang and J. Goodman, "emcee: the MCMC hammer",
       PASP 125:306–312, 2013. doi:10.1086/670067
.. [2] D. W. Hogg, J. Bovy and D. Lang, "Data analysis recipes: fitting a model to data",
       arXiv:1008.4686, 2010.
.. [3] C. C. Margossian et al., "Nested R-hat: assessing the convergence of Markov chain Monte
       Carlo when running many short chains", arXiv:2110.13017.
.. [4] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.3.
"""

from __future__ import annotations

import time
import warnings

import numpy as np

from ...errors import MCMCWarning
from ...problem import Estimate, PriorSummary
from .._blas import single_thread
from .._checks import check_positive, check_s_bounds
from ..gaussian import DEFAULT_S_BOUNDS, GaussianPosterior, truncation_warning
from . import diagnostics as diag
from .collapsed import CollapsedModel
from .ensemble import moves_for, run_emcee, thin_chains
from .hyper import Hyper, laplace
from .limits import LOO_MAX_READINGS, loo_note, per_reading_step

__all__ = ["MCMCSampler", "mcmc"]

_LOG2PI = float(np.log(2 * np.pi))




class MCMCSampler:
    r"""Posterior draws of the coefficients with uncertain hyperparameters (emcee).

    Parameters
    ----------
    faulty : bool, default=False
        Per-reading good/faulty mixture (see module Notes); gives each sensor's posterior
        fault probability.
    angle_sd_deg : float, optional
        Prior sd (degrees) of each sensor's polar-angle error; the sampler integrates over it.
    s, tau, noise_sd : float, optional
        Hold a hyperparameter fixed instead of sampling it (``noise_sd``: common noise sd for
        readings without sigma, or the factor on given sigmas when ``fit_noise_scale``).
    fit_noise_scale : bool, default=False
        With given sigmas, sample a common factor on them.
    s_bounds : (float, float), default=DEFAULT_S_BOUNDS
        Support of the uniform prior on ``s``.
    collapsed : bool, default=True
        Integrate the coefficients out (fast). ``False`` runs emcee over all coefficients too
        (the baseline; default model only).
    n_ensembles : int, default=4
        Independent ensembles (superchains for nested R-hat); at least 4.
    nwalkers : int, optional
        Walkers per ensemble, default ``max(64, 4 * ndim)`` (even). The log density is
        evaluated for all walkers of a half-ensemble in one vectorised call, so more walkers
        cost little: on the demo problem 64 walkers gave 1.8x the effective samples per second
        of 32.
    max_steps : int, default=20000
        Step cap per ensemble.
    min_steps : int, default=500
    n_draws : int, default=2000
        About this many posterior draws are kept over all walkers.
    fault_rate : float, default=0.05
        Prior mean of the fault rate; prior Beta(20 * rate, 20 * (1 - rate)).
    sigma_bad : float, optional
        sd of a faulty reading (field units); default the larger of the readings' sd and 10
        times the typical noise.
    rng : None, int or numpy.random.Generator
        Seed of all randomness (emcee's stream is derived from it).
    progress : bool, default=True
        tqdm progress bar (only on a terminal).

    Attributes
    ----------
    chains_ : ndarray
        Hyperparameter chains (ensembles, steps, walkers, ndim) of the last fit.
    posterior_ : xarray.DataTree
        arviz DataTree of the kept draws (also in ``Estimate.extras["posterior"]``).

    Examples
    --------
    >>> import numpy as np
    >>> from invert import Disk, LinearProblem
    >>> d = Disk(1.0, (0, 0), 22)
    >>> th = np.linspace(0, 2 * np.pi, 16, endpoint=False)
    >>> pts = d.from_polar(1.0, th)
    >>> y = 20 + np.cos(th) + 0.05 * np.random.default_rng(0).standard_normal(16)
    >>> prob = LinearProblem(d.design(pts), y, np.full(16, 0.05), d.degrees, d.eigenvalues,
    ...                      d, points=pts)
    >>> est = MCMCSampler(rng=0, progress=False, s=2.0).fit(prob)
    >>> bool(abs(est.at([[0.0, 0.0]]).mean[0] - 20) < 0.1)
    True
    """

    def __init__(self, *, faulty=False, angle_sd_deg=None, s=None, tau=None, noise_sd=None,
                 fit_noise_scale=False, s_bounds=DEFAULT_S_BOUNDS, collapsed=True,
                 n_ensembles=4, nwalkers=None, max_steps=20000, min_steps=500, n_draws=2000,
                 fault_rate=0.05, sigma_bad=None, rng=None, progress=True):
        self.faulty = faulty
        self.angle_sd_deg = angle_sd_deg
        self.s = s
        self.tau = tau
        self.noise_sd = noise_sd
        self.fit_noise_scale = fit_noise_scale
        self.s_bounds = s_bounds
        self.collapsed = collapsed
        self.n_ensembles = n_ensembles
        self.nwalkers = nwalkers
        self.max_steps = max_steps
        self.min_steps = min_steps
        self.n_draws = n_draws
        self.fault_rate = fault_rate
        self.sigma_bad = sigma_bad
        self.rng = rng
        self.progress = progress

    @classmethod
    def from_settings(cls, *, s=2.0, seed=None, fix_s=False, **options):
        """Build the stage from the assembly layer's settings (:mod:`invert.stages.registry`).

        ``s`` is held fixed only with ``fix_s=True`` (otherwise it only sized the truncation
        and is sampled within ``s_bounds``); ``seed`` seeds all randomness.
        """
        return cls(s=s if fix_s else None, rng=seed, **options)

    def lowest_s(self):
        """Return the roughest smoothness order the stage tries.

        The roughest smoothness order tried: ``s`` when fixed, else the lower end of
        ``s_bounds`` (the assembly layer sizes the truncation for it).
        """
        lo, _ = check_s_bounds(self.s_bounds, "MCMCSampler")
        if self.s is None:
            return lo
        from ...prior import SmoothnessPrior

        SmoothnessPrior(s=float(self.s))  # validates s
        return float(self.s)

    # --- checks and set-up ---------------------------------------------------------------
    def _check(self, problem):
        where = "MCMCSampler"
        if problem.n_readings < 3:
            raise ValueError(f"At least 3 readings are needed; got {problem.n_readings}.")
        for name in ("n_ensembles", "max_steps", "min_steps", "n_draws"):
            v = getattr(self, name)
            if not (isinstance(v, (int, np.integer)) and v >= 1):
                raise ValueError(f"The '{name}' parameter of {where} must be an int >= 1. "
                                 f"Got {v!r} instead.")
        if self.n_ensembles < 4:
            raise ValueError(f"The 'n_ensembles' parameter of {where} must be an int >= 4 "
                             f"(convergence is judged across ensembles). Got "
                             f"{self.n_ensembles!r} instead.")
        check_positive(self.tau, "tau", where)
        check_positive(self.noise_sd, "noise_sd", where)
        check_positive(self.angle_sd_deg, "angle_sd_deg", where)
        check_positive(self.sigma_bad, "sigma_bad", where)
        if not (0 < float(self.fault_rate) < 1):
            raise ValueError(f"The 'fault_rate' parameter of {where} must be a float in the "
                             f"range (0, 1). Got {self.fault_rate!r} instead.")
        if not self.collapsed and (self.faulty or self.angle_sd_deg):
            raise ValueError("collapsed=False is the all-coefficient baseline of the default "
                             "model; it cannot be combined with faulty or angle_sd_deg.")
        if self.angle_sd_deg:
            # The angle-error model turns sensors about the centre (LinearProblem.
            # rotated_design); a problem or domain that cannot do so fails here, clearly.
            problem.rotated_design(np.zeros((1, problem.n_readings)))
        if self.s is not None:
            from ...prior import SmoothnessPrior

            SmoothnessPrior(s=float(self.s))
        if problem.sigma is not None and self.noise_sd is not None and not self.fit_noise_scale:
            raise ValueError("The 'noise_sd' parameter of MCMCSampler applies to readings "
                             "without sigma (or with fit_noise_scale=True).")

    def _setup(self, problem, notes):
        lo, hi = check_s_bounds(self.s_bounds, "MCMCSampler")
        if self.s is None:
            floor = problem.truncation_floor(lo, hi)
            if floor > lo:
                notes.append(f"the truncation degree supports s >= {floor:.3g} only; the prior "
                             f"range of s was raised from {lo:g}. Use more harmonics")
                lo = floor
        elif not problem.truncation_holds(float(self.s)):
            notes.append(truncation_warning(problem, float(self.s)))
        hyper = Hyper(problem, (lo, hi), tau=self.tau, s=self.s, noise_sd=self.noise_sd,
                       fit_noise_scale=self.fit_noise_scale)
        return hyper, list(problem.assembly_notes)

    def _start(self, problem, hyper, cm):
        """Posterior mode of the collapsed model and the Laplace covariance there."""
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            g = GaussianPosterior(s=hyper.fixed["s"], tau=hyper.fixed["tau"],
                                  noise_sd=None if problem.sigma is not None else
                                  hyper.fixed["noise"],
                                  fit_noise_scale=hyper.fixed["noise"] is None,
                                  s_bounds=hyper.s_bounds)
            g.fit(problem)
        s0 = float(np.clip(g.s_, *hyper.s_bounds)) if hyper.fixed["s"] is None else g.s_
        lo, hi = hyper.s_bounds
        s0 = min(max(s0, lo + 1e-3 * (hi - lo)), hi - 1e-3 * (hi - lo))
        x0 = hyper.pack(g.tau_, s0, g.noise_sd_)
        if hyper.ndim == 0:
            return x0, np.zeros((0, 0))
        bounds = [(lo + 1e-6, hi - 1e-6) if n == "s" else (-50, 50) for n in hyper.names]
        return laplace(lambda th: self._logp_collapsed(th, hyper, cm), x0, bounds)

    @staticmethod
    def _logp_collapsed(theta, hyper, cm):
        theta = np.atleast_2d(theta)
        lp = hyper.log_prior(theta)
        ok = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            tau, s, nu = hyper.unpack(theta[ok])
            out[ok] = lp[ok] + cm.loglik(tau, s, (nu**2)[:, None])
        return out

    @staticmethod
    def _logp_full(theta, hyper, cm):
        theta = np.atleast_2d(theta)
        dh = hyper.ndim
        lp = hyper.log_prior(theta[:, :dh])
        ok = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            tau, s, nu = hyper.unpack(theta[ok, :dh])
            c = theta[ok, dh:]
            pv = cm.prior_var(tau, s)
            r = cm.yw[None, :] - c @ cm.Gw.T
            ll = (-0.5 * np.sum(r**2, axis=1) / nu**2 - cm.m * np.log(nu)
                  - 0.5 * cm.m * _LOG2PI + cm.log_w)
            lpc = -0.5 * np.sum(c**2 / pv + np.log(pv), axis=1) - 0.5 * cm.p * _LOG2PI
            out[ok] = lp[ok] + ll + lpc
        return out

    # --- fit ------------------------------------------------------------------------------
    def fit(self, problem) -> Estimate:
        """Sample the posterior and return an Estimate with ``draws``."""
        with single_thread():
            return self._fit(problem)

    def _fit(self, problem):
        self._check(problem)
        rng = np.random.default_rng(self.rng)
        notes = []
        clock = [time.perf_counter()]
        hyper, info_notes = self._setup(problem, notes)
        cm = CollapsedModel(problem)
        x_map, cov_map = self._start(problem, hyper, cm)
        clock.append(time.perf_counter())
        if self.faulty or self.angle_sd_deg:
            from .augmented import run_augmented

            res = run_augmented(self, problem, hyper, cm, x_map, cov_map, rng, notes)
        else:
            res = self._run_default(problem, hyper, cm, x_map, cov_map, rng)
        clock.append(time.perf_counter())
        est = self._finish(problem, hyper, cm, res, rng, notes, info_notes)
        clock.append(time.perf_counter())
        # Seconds spent in each phase, kept out of info (which must not vary between runs
        # with one seed); bench/bench_mcmc.py reads them.
        est.extras["timing_s"] = {"mode_search": clock[1] - clock[0],
                                  "sampling_and_draws": clock[2] - clock[1],
                                  "diagnostics": clock[3] - clock[2]}
        return est

    def _run_default(self, problem, hyper, cm, x_map, cov_map, rng):
        K = int(self.n_ensembles)
        dh = hyper.ndim
        if self.collapsed:
            d = dh
            logp = lambda th: self._logp_collapsed(th, hyper, cm)  # noqa: E731
            centre, cov = x_map, cov_map
        else:
            tau, s, nu = hyper.unpack(x_map[None])
            nv = (nu**2)[:, None]
            cmean, _ = cm.conditional(tau, s, nv, rng=rng)
            d = dh + cm.p
            logp = lambda th: self._logp_full(th, hyper, cm)  # noqa: E731
            centre = np.concatenate([x_map, cmean[0]])
            # Coefficient block: conditional covariance at the mode (from exact draws).
            _, cd = cm.conditional(np.repeat(tau, 4 * cm.p), np.repeat(s, 4 * cm.p),
                                   np.repeat(nv, 4 * cm.p, axis=0), rng=rng)
            cov = np.zeros((d, d))
            cov[:dh, :dh] = cov_map
            cov[dh:, dh:] = np.cov(cd, rowvar=False) + 1e-12 * np.eye(cm.p)
        if d == 0:
            # Nothing to sample: exact iid draws of the coefficients, as K chains.
            per = int(np.ceil(self.n_draws / K))
            tau, s, nu = hyper.unpack(np.zeros((K * per, 0)))
            mean, draw = cm.conditional(tau, s, (nu**2)[:, None], rng=rng)
            run = {"n_steps": 0, "tau_int": None, "converged": True, "acceptance": None,
                   "sampler": "exact Gaussian draws (all hyperparameters fixed)"}
            theta = np.zeros((K, per, 0))
            return dict(theta=theta, ids=np.arange(K), coef=draw.reshape(K, per, -1),
                        coef_mean=mean.reshape(K, per, -1), noise_rows=None, run=run,
                        extra={}, chains=None)
        nw = self.nwalkers or max(64, 4 * d)
        nw += nw % 2
        # Ensemble centres: the mode, then draws from the Laplace approximation; walkers in a
        # small ball (1e-3 sd) around each centre.
        L = np.linalg.cholesky(cov + 1e-12 * np.eye(d))
        centres = np.vstack([centre] + [centre + L @ rng.standard_normal(d)
                                        for _ in range(K - 1)])
        if "s" in hyper.names:
            j = hyper.names.index("s")
            lo, hi = hyper.s_bounds
            centres[:, j] = np.clip(centres[:, j], lo + 0.01 * (hi - lo), hi - 0.01 * (hi - lo))
        ball = 1e-3 * np.sqrt(np.diag(cov))
        chains, run = run_emcee(logp, centres, ball, nw, rng, max_steps=int(self.max_steps),
                                 min_steps=int(self.min_steps), check_every=250,
                                 progress=self.progress, desc="mcmc")
        self.chains_ = chains
        kept, ids, burn, thin = thin_chains(chains, int(self.n_draws))
        run.update(burn=burn, thin=thin, nwalkers=nw, n_ensembles=K,
                   sampler=f"emcee ({moves_for(d)[1]}), " +
                   ("coefficients integrated out" if self.collapsed else "all coefficients"))
        C, D, _ = kept.shape
        flat = kept.reshape(C * D, d)
        theta = kept[:, :, :dh]
        if self.collapsed:
            tau, s, nu = hyper.unpack(flat)
            mean, draw = cm.conditional(tau, s, (nu**2)[:, None], rng=rng)
            coef, coef_mean = draw.reshape(C, D, -1), mean.reshape(C, D, -1)
            # Pointwise log p(y_i | y_-i, theta), coefficients integrated out: the factor
            # PSIS-LOO needs for a Gaussian latent model (Vehtari et al. 2016, JMLR 17(103)).
            # Computed with the diagnostics (in _finish).
            extra = {"log_lik": lambda: cm.loo_loglik(tau, s, (nu**2)[:, None]).reshape(C, D, -1)} \
                if cm.m <= LOO_MAX_READINGS else {}
        else:
            coef = kept[:, :, dh:]
            coef_mean = coef
            extra = {}
        return dict(theta=theta, ids=ids, coef=coef, coef_mean=coef_mean, noise_rows=None,
                    run=run, extra=extra, chains=chains)

    def _posterior_tree(self, problem, hyper, cm, res, rng):
        """Build the arviz tree of the kept draws.

        Returns ``(tree, (tau, s, nu), residuals, sampled variable names)``; the pointwise
        log-likelihood and predictive draws of each reading are in the readings' own units.
        """
        theta, coef = res["theta"], res["coef"]
        C, D = coef.shape[:2]
        tau, s, nu = hyper.unpack(theta.reshape(C * D, -1))
        tau, s, nu = (v.reshape(C, D) for v in (tau, s, nu))
        post = {"tau": tau, "s": s, hyper.noise_name: nu, "coef": coef}
        post.update(res["extra"].get("posterior", {}))
        sel = slice(None, None, per_reading_step(C, D, cm.m))  # bounds draws x readings
        sd_rows = (1.0 / cm.w)[None, None, :] * nu[:, sel, None]
        mu = res["extra"].get("mu")
        mu = np.einsum("cdp,mp->cdm", coef[:, sel], problem.G) if mu is None else mu[:, sel]
        r = problem.y[None, None, :] - mu
        if "log_lik" in res["extra"]:
            ll = res["extra"]["log_lik"]
            ll = (ll() if callable(ll) else ll)[:, sel]
        else:
            ll = -0.5 * _LOG2PI - np.log(sd_rows) - 0.5 * (r / sd_rows) ** 2
        y_rep = mu + sd_rows * rng.standard_normal(mu.shape)
        if "y_rep_noise" in res["extra"]:
            y_rep = mu + res["extra"]["y_rep_noise"][:, sel]
        sampled = ["tau", "s", hyper.noise_name]
        sampled = [v for v, n in zip(sampled, ["log_tau", "s", "log_noise"], strict=True)
                   if n in hyper.names] + res["extra"].get("diag_vars", [])
        dt = diag.build_tree(problem, post, ll, y_rep,
                             sensor_vars=res["extra"].get("sensor_vars", ()),
                             attrs={"model": self._model_name(), "inference": "invert.mcmc"})
        return dt, (tau, s, nu), r, sampled

    def _finish(self, problem, hyper, cm, res, rng, notes, info_notes):
        coef, ids = res["coef"], res["ids"]
        C, D = coef.shape[:2]
        dt, (tau, s, nu), r, sampled = self._posterior_tree(problem, hyper, cm, res, rng)
        self.posterior_ = dt
        conv = diag.convergence(dt, ids, sampled) if res["run"]["n_steps"] else \
            diag.convergence(dt, ids, [])
        notes.extend(diag.convergence_warnings(conv))
        if res["run"]["n_steps"] and not res["run"]["converged"]:
            notes.append(f"the chains reached the step cap ({res['run']['n_steps']} steps) "
                         f"before 50 autocorrelation times (tau = {res['run']['tau_int']:.3g}); "
                         f"try a larger max_steps (--max-steps)")
        info_notes = list(info_notes) + loo_note(C, D, cm.m, "log_lik" in res["extra"])
        loo, k = diag.psis_loo(dt)
        w = diag.pareto_warning(problem, k)
        if w:
            notes.append(w)
        draws = coef.reshape(C * D, -1)
        mean = res["coef_mean"].reshape(C * D, -1).mean(axis=0)
        table = self._sensor_table(problem, r, k, res["extra"])
        if "fault_probability" in table:
            bad = table.loc[table["fault_probability"] > 0.5]
            if len(bad):
                notes.append("sensor(s) probably faulty (posterior fault probability > 0.5): " +
                             ", ".join(f"{a} ({p:.2f})" for a, p in
                                       zip(bad["sensor"], bad["fault_probability"],
                                           strict=True)))
        noise_pred = float(np.mean(nu) * (np.median(problem.sigma) if hyper.known else 1.0))
        summ = {}
        for name, arr in (("tau", tau), ("s", s), (hyper.noise_name, nu)):
            q = np.quantile(arr, [0.05, 0.5, 0.95])
            summ[name] = {"mean": float(arr.mean()), "sd": float(arr.std(ddof=1)),
                          "q05": float(q[0]), "median": float(q[1]), "q95": float(q[2])}
        info = {
            "method": "mcmc",
            "model": self._model_name(),
            "hyperparameters": summ,
            "priors": hyper.describe() | res["extra"].get("priors", {}),
            "sampled": list(hyper.names) + res["extra"].get("sampled", []),
            "n_readings": problem.n_readings,
            "n_coefficients": problem.n_coef,
            "n_modes": problem.n_modes,
            "n_draws": int(C * D),
            "sampling": {k: v for k, v in res["run"].items()},
            "convergence": conv,
            "loo": loo,
            "noise": "given per reading" if hyper.known else "common level, sampled",
            "notes": info_notes,
        }
        info.update(res["extra"].get("info", {}))
        for n in notes:
            warnings.warn(n, MCMCWarning, stacklevel=3)
        return Estimate(mean=mean, draws=draws, domain=problem.domain, method="mcmc",
                        noise_sd=noise_pred, info=info,
                        warnings=tuple(problem.notes) + tuple(notes),
                        prior=PriorSummary(s=summ["s"]["median"], tau=summ["tau"]["median"],
                                           s_draws=np.asarray(s, float).ravel(),
                                           tau_draws=np.asarray(tau, float).ravel()),
                        extras={"posterior": dt, "sensor_table": table,
                                "trace": _trace_record(res, hyper)})

    def _model_name(self):
        parts = []
        if self.faulty:
            parts.append("faulty sensors (good/faulty mixture)")
        if self.angle_sd_deg:
            parts.append(f"sensor angle error (sd {self.angle_sd_deg:g} deg)")
        if not parts:
            parts.append("collapsed hyperparameter sampler" if self.collapsed else
                         "joint sampler over all coefficients")
        return "; ".join(parts)

    @staticmethod
    def _sensor_table(problem, r, k, extra):
        import pandas as pd

        pts = problem.points if problem.points is not None else np.full((problem.n_readings, 2),
                                                                          np.nan)
        data = {"sensor": [str(v) for v in problem.sensor], "x": pts[:, 0], "y": pts[:, 1],
                "value": problem.y}
        data.update(extra.get("table", {}))
        data["residual_mean"] = r.mean(axis=(0, 1))
        data["pareto_k"] = k
        return pd.DataFrame(data)


def mcmc(problem, **kwargs) -> Estimate:
    """One-call form of :class:`MCMCSampler`: ``MCMCSampler(**kwargs).fit(problem)``.

    See Also
    --------
    MCMCSampler
    """
    return MCMCSampler(**kwargs).fit(problem)


def _trace_record(res, hyper, walkers=2, max_steps=1000):
    """Chains of a few walkers of each ensemble after burn-in (tau, s, noise every ``step``).

    For the trace figure (:func:`invert.report.plots.plot_traces`); None when the run kept
    no chains (the augmented samplers, or nothing sampled).
    """
    ch = res.get("chains")
    if ch is None or not hyper.ndim:
        return None
    burn = int(res["run"].get("burn", 0))
    step = max(1, -(-(ch.shape[1] - burn) // max_steps))
    th = np.moveaxis(ch[:, burn::step, :walkers, :hyper.ndim], 2, 1)  # (chain, draw, dim)
    vals = [v.reshape(-1, th.shape[2]) for v in hyper.unpack(th.reshape(-1, hyper.ndim))]
    return {"names": ["tau", "s", hyper.noise_name], "values": np.stack(vals, axis=-1),
            "burn": burn, "step": step}
