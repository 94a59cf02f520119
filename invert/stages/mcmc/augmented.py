r"""Blocked Gibbs sampler for the faulty-sensor and sensor-angle models of the MCMC stage.

Notes
-----
The latent per-reading variables (fault indicators :math:`z_i`, angle errors
:math:`\delta_i`) make the likelihood Gaussian again, so the sampler alternates exact or
Metropolis steps, all vectorised over many chains:

1. :math:`(\theta, c) \mid z, \delta, y`: :math:`\theta` (log tau, s, log noise) by a
   random-walk Metropolis step on the collapsed density :math:`p(y\mid\theta,z,\delta)p(\theta)`
   (coefficients integrated out), then :math:`c` by an exact Gaussian draw
   (:meth:`~invert.stages.mcmc.collapsed.CollapsedModel.conditional`).
2. :math:`z_i \mid c, \theta, \varepsilon`: independent Bernoulli with
   :math:`P(z_i=1) = \varepsilon N(r_i|0,\sigma_{bad}^2) / [\varepsilon N(r_i|0,\sigma_{bad}^2)
   + (1-\varepsilon)N(r_i|0,\nu^2\sigma_i^2)]` (Hogg, Bovy & Lang 2010); the fault probability
   reported per sensor is the posterior mean of this quantity (Rao–Blackwellised).
3. :math:`\varepsilon \mid z \sim \mathrm{Beta}(a + \sum z_i, b + m - \sum z_i)` (conjugate).
4. :math:`\delta_i \mid c, \theta, z`: independent random-walk Metropolis per sensor (the
   reading depends on its own angle only), step sizes tuned during warm-up and then frozen.

Every step leaves the joint posterior invariant, so the chain targets it exactly. Chains come in
``n_ensembles`` superchains started from distinct points (the chains of one superchain share a
start), which is the layout nested R-hat expects (Margossian et al., arXiv:2110.13017).

References
----------
.. [1] D. W. Hogg, J. Bovy and D. Lang, "Data analysis recipes: fitting a model to data",
       arXiv:1008.4686, 2010.
.. [2] A. Gelman et al., *Bayesian Data Analysis*, 3rd ed., CRC Press, 2013, ch. 11–12.
"""

from __future__ import annotations

import numpy as np
from scipy import special

from .chains import autocorr_max, progress_bar

_LOG2PI = float(np.log(2 * np.pi))
#: Chains per superchain: enough walkers-like chains for stable within-superchain variance.
CHAINS_PER_ENSEMBLE = 8
#: Warm-up sweeps (tuning only, discarded).
WARMUP = 300
#: Record the coefficients every this many sweeps (memory), hyperparameters every sweep.
RECORD_EVERY = 5


class GibbsSampler:
    """Blocked Gibbs sampler over the hyperparameters, coefficients and latent variables.

    Parameters
    ----------
    sampler : MCMCSampler
        Settings (``n_ensembles``, ``faulty``, ``angle_sd_deg``, ``sigma_bad``,
        ``fault_rate``, ``max_steps``, ``min_steps``, ``n_draws``, ``progress``).
    problem : LinearProblem
    hyper : Hyper
    cm : CollapsedModel
    rng : numpy.random.Generator
    x_map : ndarray of shape (n_hyper,)
        Posterior mode of the collapsed model (the typical noise level sets ``sigma_bad``).
    """

    def __init__(self, sampler, problem, hyper, cm, rng, x_map):
        self.settings, self.problem, self.hyper, self.cm, self.rng = \
            sampler, problem, hyper, cm, rng
        self.K = int(sampler.n_ensembles)
        self.per = CHAINS_PER_ENSEMBLE
        self.nc = self.K * self.per
        self.m, self.p = cm.m, cm.p
        self.dh = hyper.ndim
        self.faulty = bool(sampler.faulty)
        self.ang_sd = np.deg2rad(float(sampler.angle_sd_deg)) if sampler.angle_sd_deg else 0.0
        _, _, nu0 = (float(v[0]) for v in hyper.unpack(x_map[None]))
        typical = nu0 * (float(np.median(problem.sigma)) if hyper.known else 1.0)
        self.sigma_bad = float(sampler.sigma_bad) if sampler.sigma_bad else \
            max(float(np.std(problem.y)), 10 * typical)
        self.bad_w2 = (self.sigma_bad * cm.w) ** 2
        self.rate = float(sampler.fault_rate)
        self.a_eps, self.b_eps = 20 * self.rate, 20 * (1 - self.rate)
        self.design = problem.rotated_design if self.ang_sd else None

    # --- the model ---------------------------------------------------------------------------
    def noise_rows(self, nu, z):
        """Whitened noise variance of every row: ``nu**2``, or ``sigma_bad**2`` if faulty."""
        nv = np.broadcast_to((nu**2)[:, None], (nu.size, self.m))
        return np.where(z, self.bad_w2[None, :], nv) if self.faulty else nv

    def logpost(self, theta, z, D):
        """Collapsed log posterior of the hyperparameters given the latent variables."""
        hyper = self.hyper
        lp = hyper.log_prior(theta)
        ok = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            tau, s, nu = hyper.unpack(theta[ok])
            out[ok] = lp[ok] + self.cm.loglik(tau, s, self.noise_rows(nu, z[ok]),
                                              design=None if D is None else D[ok])
        return out

    # --- the chain state ---------------------------------------------------------------------
    def start(self, x_map, cov_map):
        """Superchain k starts at the mode (k=0) or a Laplace draw; latent variables at rest."""
        K, dh, nc, m, rng = self.K, self.dh, self.nc, self.m, self.rng
        if dh:
            L = np.linalg.cholesky(cov_map + 1e-12 * np.eye(dh))
            starts = np.vstack([x_map] + [x_map + L @ rng.standard_normal(dh)
                                          for _ in range(K - 1)])
            if "s" in self.hyper.names:
                j = self.hyper.names.index("s")
                lo, hi = self.hyper.s_bounds
                starts[:, j] = np.clip(starts[:, j], lo + 0.01 * (hi - lo), hi - 0.01 * (hi - lo))
            self.prop_L = L * (2.38 / np.sqrt(dh))
        else:
            starts = np.zeros((K, 0))
            self.prop_L = np.zeros((0, 0))
        self.theta = np.repeat(starts, self.per, axis=0)
        self.z = np.zeros((nc, m), bool)
        self.eps = np.full(nc, self.rate)
        self.delta = np.zeros((nc, m))
        self.step = np.full(m, 0.5 * self.ang_sd) if self.ang_sd else None
        self.D = self.design(self.delta) if self.ang_sd else None
        self.scale = 1.0

    def _step_theta(self):
        """Random-walk Metropolis on the collapsed density; returns the acceptance rate."""
        nc, rng = self.nc, self.rng
        lp = self.logpost(self.theta, self.z, self.D)
        prop = self.theta + self.scale * rng.standard_normal((nc, self.dh)) @ self.prop_L.T
        lq = self.logpost(prop, self.z, self.D)
        with np.errstate(invalid="ignore"):
            accept = np.log(rng.random(nc)) < lq - lp
        self.theta = np.where(accept[:, None], prop, self.theta)
        return accept.mean()

    def _step_faults(self, mu, nu):
        """Bernoulli fault indicators and the conjugate Beta fault rate; returns P(faulty)."""
        rng, m, eps, bad_w2 = self.rng, self.m, self.eps, self.bad_w2
        r2 = (self.cm.w[None, :] * (self.problem.y[None, :] - mu)) ** 2
        nu2 = (nu**2)[:, None]
        lg = np.log1p(-eps)[:, None] - 0.5 * np.log(nu2) - 0.5 * r2 / nu2
        lb = np.log(eps)[:, None] - 0.5 * np.log(bad_w2)[None, :] - 0.5 * r2 / bad_w2
        pf = special.expit(lb - lg)
        self.z = rng.random((self.nc, m)) < pf
        k = self.z.sum(axis=1)
        self.eps = rng.beta(self.a_eps + k, self.b_eps + m - k)
        return pf

    def _step_angles(self, c, mu, nu, tune):
        """Two per-sensor random-walk Metropolis steps of the angle offsets; returns ``mu``."""
        rng, nc, m, cm, ang_sd = self.rng, self.nc, self.m, self.cm, self.ang_sd
        nv = self.noise_rows(nu, self.z)
        acc_d = np.zeros(m)
        for _ in range(2):
            dprop = self.delta + self.step[None, :] * rng.standard_normal((nc, m))
            Dp = self.design(dprop)
            mup = np.einsum("bmp,bp->bm", Dp, c)
            wy = cm.w[None, :] * self.problem.y[None, :]
            l0 = -0.5 * (wy - cm.w * mu) ** 2 / nv - 0.5 * (self.delta / ang_sd) ** 2
            l1 = -0.5 * (wy - cm.w * mup) ** 2 / nv - 0.5 * (dprop / ang_sd) ** 2
            acc = np.log(rng.random((nc, m))) < l1 - l0
            self.delta = np.where(acc, dprop, self.delta)
            mu = np.where(acc, mup, mu)
            self.D = np.where(acc[:, :, None], Dp, self.D)
            acc_d += acc.mean(axis=0) / 2
        if tune:
            # Robbins-Monro toward the 1-D optimum acceptance 0.44 (tuning only in warm-up).
            self.step = self.step * np.exp(acc_d - 0.44)
        return mu

    def sweep(self, tune):
        """One sweep of steps 1-4 (module Notes); returns ``(cmean, c, mu, pf)``."""
        acc_theta = self._step_theta() if self.dh else 0.0
        tau, s, nu = self.hyper.unpack(self.theta)
        nv = self.noise_rows(nu, self.z)
        cmean, c = self.cm.conditional(tau, s, nv, rng=self.rng, design=self.D)
        G = self.cm.problem.G[None] if self.D is None else self.D
        mu = np.einsum("bmp,bp->bm", np.broadcast_to(G, (self.nc, self.m, self.p)), c)
        pf = self._step_faults(mu, nu) if self.faulty else None
        if self.ang_sd:
            mu = self._step_angles(c, mu, nu, tune)
        if tune and self.dh:
            self.scale *= np.exp(0.5 * (acc_theta - 0.3))
        return cmean, c, mu, pf

    # --- the run -----------------------------------------------------------------------------
    def _warm_up(self):
        """Tuning sweeps; the proposal shape is re-estimated from pooled warm-up draws."""
        dh = self.dh
        warm = []
        for i in range(WARMUP):
            self.sweep(tune=True)
            if dh and i >= WARMUP // 3:
                warm.append(self.theta.copy())
            if dh and i == 2 * WARMUP // 3:
                W = np.concatenate(warm)
                cov = np.cov(W, rowvar=False).reshape(dh, dh) + 1e-10 * np.eye(dh)
                self.prop_L = np.linalg.cholesky(cov) * (2.38 / np.sqrt(dh))
                self.scale = 1.0

    def _tau_int(self, rec_theta, rec):
        """Largest integrated autocorrelation time of the recorded scalars and angles."""
        dh = self.dh
        tr = np.array(rec_theta)
        cols = [tr[..., j] for j in range(dh)] + ([tr[..., dh]] if self.faulty else [])
        if self.ang_sd:
            dl = np.array(rec["delta"])
            tau_d = RECORD_EVERY * autocorr_max(dl) if len(dl) >= 20 else np.inf
        else:
            tau_d = 0.0
        return max(autocorr_max(np.stack(cols, axis=-1)) if cols else 0.0, tau_d)

    def _sample(self, bar):
        """Record sweeps until 50 autocorrelation times or ``max_steps``."""
        nc, m = self.nc, self.m
        rec_theta, rec = [], {"coef": [], "coef_mean": [], "mu": [], "pf": [], "eps": [],
                              "delta": [], "z": []}
        max_sweeps, min_sweeps = int(self.settings.max_steps), int(self.settings.min_steps)
        n, tau_int, converged = 0, np.inf, False
        while n < max_sweeps:
            cmean, c, mu, pf = self.sweep(tune=False)
            rec_theta.append(np.concatenate([self.theta, self.eps[:, None]], axis=1))
            if n % RECORD_EVERY == 0:
                rec["coef"].append(c)
                rec["coef_mean"].append(cmean)
                rec["mu"].append(mu)
                rec["eps"].append(self.eps.copy())
                rec["delta"].append(self.delta.copy())
                rec["z"].append(self.z.copy())
                rec["pf"].append(pf if pf is not None else np.zeros((nc, m)))
            n += 1
            bar.update(1)
            if n >= min_sweeps and n % 250 == 0:
                tau_int = self._tau_int(rec_theta, rec)
                if n >= 50 * tau_int:
                    converged = True
                    break
        return rec_theta, rec, {"n_steps": n, "tau_int": tau_int, "converged": converged}

    def run(self, x_map, cov_map):
        """Warm up, sample and thin; returns the dict ``MCMCSampler._finish`` expects."""
        self.start(x_map, cov_map)
        with progress_bar(WARMUP + int(self.settings.max_steps), self.settings.progress,
                          "mcmc (Gibbs)") as bar:
            self._warm_up()
            bar.update(WARMUP)
            rec_theta, rec, run = self._sample(bar)
        draws = _Thinned(rec_theta, rec, self.nc, self.dh, int(self.settings.n_draws))
        extra = self._extra(draws)
        run.update(warmup_sweeps=WARMUP, thin=draws.thin * RECORD_EVERY, n_chains=self.nc,
                   n_ensembles=self.K, chains_per_ensemble=self.per, sampler=self._describe())
        return dict(theta=draws.theta, ids=np.repeat(np.arange(self.K), self.per),
                    coef=draws.pick("coef"), coef_mean=draws.pick("coef_mean"), noise_rows=None,
                    run=run, extra=extra, chains=None)

    def _describe(self):
        return ("blocked Gibbs: collapsed random-walk Metropolis on the hyperparameters, "
                "exact Gaussian coefficients" + (", Bernoulli fault indicators, Beta "
                                                 "fault rate" if self.faulty else "") +
                (", per-sensor Metropolis angle offsets" if self.ang_sd else ""))

    # --- results -----------------------------------------------------------------------------
    def _loo_loglik(self, draws):
        """Compute the pointwise leave-one-out log-likelihood.

        Integrated pointwise ``log p(y_i | y_-i, theta, latent_-i)`` for PSIS-LOO, and the
        row noise variances, per kept draw.
        """
        cm, m, nc, D_ = self.cm, self.m, self.nc, draws.n
        tau, s, nu = self.hyper.unpack(draws.theta.reshape(nc * D_, self.dh))
        zf = draws.pick("z").reshape(nc * D_, m)
        nv = self.noise_rows(nu, zf)
        Dd = self.design(draws.pick("delta").reshape(nc * D_, m)) if self.ang_sd else None
        mu_loo, var_loo = cm.loo_moments(tau, s, nv, design=Dd)
        yw = cm.yw[None, :]
        if self.faulty:
            bad_w2 = self.bad_w2
            epsf = draws.pick("eps").reshape(nc * D_)
            sig2 = var_loo - nv
            lg = np.log1p(-epsf)[:, None] - 0.5 * (np.log(sig2 + (nu**2)[:, None])
                                                  + (yw - mu_loo) ** 2 / (sig2 + (nu**2)[:, None]))
            lb = np.log(epsf)[:, None] - 0.5 * (np.log(sig2 + bad_w2[None, :])
                                                + (yw - mu_loo) ** 2 / (sig2 + bad_w2[None, :]))
            ll = np.logaddexp(lg, lb) - 0.5 * _LOG2PI + np.log(cm.w)[None, :]
        else:
            ll = (-0.5 * (_LOG2PI + np.log(var_loo) + (yw - mu_loo) ** 2 / var_loo)
                  + np.log(cm.w)[None, :])
        return ll.reshape(nc, D_, m), nv

    def _extra(self, draws):
        """Model-specific parts of the result: posterior variables, table columns, priors."""
        nc, m, D_ = self.nc, self.m, draws.n
        extra = {"posterior": {}, "sensor_vars": [], "diag_vars": [], "table": {}, "info": {},
                 "priors": {}, "sampled": [], "mu": draws.pick("mu")}
        extra["log_lik"], nv = self._loo_loglik(draws)
        sd_rows = np.sqrt(nv) / self.cm.w[None, :]
        extra["y_rep_noise"] = (sd_rows * self.rng.standard_normal(sd_rows.shape)).reshape(
            nc, D_, m)
        if self.faulty:
            self._fault_extra(extra, draws)
        if self.ang_sd:
            dd = np.rad2deg(draws.pick("delta"))
            extra["posterior"]["angle_offset_deg"] = dd
            extra["sensor_vars"].append("angle_offset_deg")
            extra["sampled"].append("sensor angle offsets")
            extra["table"]["angle_offset_deg_mean"] = dd.mean(axis=(0, 1))
            extra["table"]["angle_offset_deg_sd"] = dd.std(axis=(0, 1), ddof=1)
            extra["priors"]["angle_offset"] = (f"delta_i ~ Normal(0, "
                                               f"{self.settings.angle_sd_deg:g}^2) degrees, "
                                               f"independent per sensor")
        return extra

    def _fault_extra(self, extra, draws):
        pf = draws.pick("pf")
        extra["posterior"].update(fault_rate=draws.pick("eps"), fault_probability=pf)
        extra["sensor_vars"].append("fault_probability")
        extra["diag_vars"].append("fault_rate")
        extra["sampled"] += ["fault indicators", "fault_rate"]
        extra["table"]["fault_probability"] = pf.mean(axis=(0, 1))
        extra["priors"]["fault_rate"] = (f"Beta({self.a_eps:.3g}, {self.b_eps:.3g}) (prior "
                                         f"mean {self.rate:g})")
        extra["priors"]["sigma_bad"] = (f"faulty readings ~ Normal(model, "
                                        f"{self.sigma_bad:.4g}^2)"
                                        + ("" if self.settings.sigma_bad else
                                           " (larger of the readings' sd and 10x the noise)"))
        extra["info"]["sigma_bad"] = self.sigma_bad


class _Thinned:
    """Equal-length thinned draws per chain from the recorded sweeps."""

    def __init__(self, rec_theta, rec, nc, dh, n_draws):
        n_rec = len(rec["coef"])
        want = max(8, int(np.ceil(n_draws / nc)))
        self.thin = max(1, n_rec // want)
        self.sel = np.arange(n_rec)[::self.thin][-want:]
        self.n = len(self.sel)
        self.rec = rec
        rt = np.array(rec_theta)[::RECORD_EVERY][self.sel]  # (D, nc, dh+1)
        self.theta = np.moveaxis(rt[..., :dh], 0, 1)

    def pick(self, key):
        """Return the recorded ``key`` at the kept sweeps, shape (nc, D, ...)."""
        a = np.array(self.rec[key])[self.sel]  # (D, nc, ...)
        return np.moveaxis(a, 0, 1)


def run_augmented(sampler, problem, hyper, cm, x_map, cov_map, rng, notes):
    """Run the blocked Gibbs sampler; returns the dict ``MCMCSampler._finish`` expects.

    ``notes`` is kept for the stage's interface (this sampler adds none).
    """
    return GibbsSampler(sampler, problem, hyper, cm, rng, x_map).run(x_map, cov_map)
