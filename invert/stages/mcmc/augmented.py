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


def run_augmented(sampler, problem, hyper, cm, x_map, cov_map, rng, notes):
    """Run the blocked Gibbs sampler; returns the dict ``MCMCSampler._finish`` expects."""
    K = int(sampler.n_ensembles)
    per = CHAINS_PER_ENSEMBLE
    nc = K * per
    m, p = cm.m, cm.p
    dh = hyper.ndim
    faulty = bool(sampler.faulty)
    ang_sd = np.deg2rad(float(sampler.angle_sd_deg)) if sampler.angle_sd_deg else 0.0

    tau0, s0, nu0 = (float(v[0]) for v in hyper.unpack(x_map[None]))
    typical = nu0 * (float(np.median(problem.sigma)) if hyper.known else 1.0)
    sigma_bad = float(sampler.sigma_bad) if sampler.sigma_bad else \
        max(float(np.std(problem.y)), 10 * typical)
    bad_w2 = (sigma_bad * cm.w) ** 2
    rate = float(sampler.fault_rate)
    a_eps, b_eps = 20 * rate, 20 * (1 - rate)

    design = problem.rotated_design if ang_sd else None

    def noise_rows(nu, z):
        nv = np.broadcast_to((nu**2)[:, None], (nu.size, m))
        return np.where(z, bad_w2[None, :], nv) if faulty else nv

    def logpost(theta, z, D):
        lp = hyper.log_prior(theta)
        ok = np.isfinite(lp)
        out = np.full(theta.shape[0], -np.inf)
        if ok.any():
            tau, s, nu = hyper.unpack(theta[ok])
            out[ok] = lp[ok] + cm.loglik(tau, s, noise_rows(nu, z[ok]),
                                         design=None if D is None else D[ok])
        return out

    # --- starting points: superchain k at the mode (k=0) or a Laplace draw ------------------
    if dh:
        L = np.linalg.cholesky(cov_map + 1e-12 * np.eye(dh))
        starts = np.vstack([x_map] + [x_map + L @ rng.standard_normal(dh) for _ in range(K - 1)])
        if "s" in hyper.names:
            j = hyper.names.index("s")
            lo, hi = hyper.s_bounds
            starts[:, j] = np.clip(starts[:, j], lo + 0.01 * (hi - lo), hi - 0.01 * (hi - lo))
        prop_L = L * (2.38 / np.sqrt(dh))
    else:
        starts = np.zeros((K, 0))
        prop_L = np.zeros((0, 0))
    theta = np.repeat(starts, per, axis=0)
    z = np.zeros((nc, m), bool)
    eps = np.full(nc, rate)
    delta = np.zeros((nc, m))
    step = np.full(m, 0.5 * ang_sd) if ang_sd else None
    D = design(delta) if ang_sd else None
    scale = 1.0

    def sweep(tune):
        nonlocal theta, z, eps, delta, D, scale, step
        acc_theta = 0.0
        if dh:
            lp = logpost(theta, z, D)
            prop = theta + scale * rng.standard_normal((nc, dh)) @ prop_L.T
            lq = logpost(prop, z, D)
            with np.errstate(invalid="ignore"):
                accept = np.log(rng.random(nc)) < lq - lp
            theta = np.where(accept[:, None], prop, theta)
            acc_theta = accept.mean()
        tau, s, nu = hyper.unpack(theta)
        nv = noise_rows(nu, z)
        cmean, c = cm.conditional(tau, s, nv, rng=rng, design=D)
        G = cm.problem.G[None] if D is None else D
        mu = np.einsum("bmp,bp->bm", np.broadcast_to(G, (nc, m, p)), c)
        pf = None
        if faulty:
            r2 = (cm.w[None, :] * (problem.y[None, :] - mu)) ** 2
            nu2 = (nu**2)[:, None]
            lg = np.log1p(-eps)[:, None] - 0.5 * np.log(nu2) - 0.5 * r2 / nu2
            lb = np.log(eps)[:, None] - 0.5 * np.log(bad_w2)[None, :] - 0.5 * r2 / bad_w2
            pf = special.expit(lb - lg)
            z = rng.random((nc, m)) < pf
            k = z.sum(axis=1)
            eps = rng.beta(a_eps + k, b_eps + m - k)
        if ang_sd:
            nv = noise_rows(nu, z)
            acc_d = np.zeros(m)
            for _ in range(2):
                dprop = delta + step[None, :] * rng.standard_normal((nc, m))
                Dp = design(dprop)
                mup = np.einsum("bmp,bp->bm", Dp, c)
                wy = cm.w[None, :] * problem.y[None, :]
                l0 = -0.5 * (wy - cm.w * mu) ** 2 / nv - 0.5 * (delta / ang_sd) ** 2
                l1 = -0.5 * (wy - cm.w * mup) ** 2 / nv - 0.5 * (dprop / ang_sd) ** 2
                acc = np.log(rng.random((nc, m))) < l1 - l0
                delta = np.where(acc, dprop, delta)
                mu = np.where(acc, mup, mu)
                D = np.where(acc[:, :, None], Dp, D)
                acc_d += acc.mean(axis=0) / 2
            if tune:
                # Robbins-Monro toward the 1-D optimum acceptance 0.44 (tuning only in warm-up).
                step = step * np.exp(acc_d - 0.44)
        if tune and dh:
            scale *= np.exp(0.5 * (acc_theta - 0.3))
        return cmean, c, mu, pf

    rec_theta, rec = [], {"coef": [], "coef_mean": [], "mu": [], "pf": [], "eps": [],
                          "delta": [], "z": []}
    max_sweeps, min_sweeps = int(sampler.max_steps), int(sampler.min_steps)
    n, tau_int, converged = 0, np.inf, False
    warm = []
    with progress_bar(WARMUP + max_sweeps, sampler.progress, "mcmc (Gibbs)") as bar:
        for i in range(WARMUP):
            sweep(tune=True)
            if dh and i >= WARMUP // 3:
                warm.append(theta.copy())
            if dh and i == 2 * WARMUP // 3:
                # Re-estimate the proposal shape from the pooled warm-up draws.
                W = np.concatenate(warm)
                cov = np.cov(W, rowvar=False).reshape(dh, dh) + 1e-10 * np.eye(dh)
                prop_L = np.linalg.cholesky(cov) * (2.38 / np.sqrt(dh))
                scale = 1.0
        bar.update(WARMUP)
        while n < max_sweeps:
            cmean, c, mu, pf = sweep(tune=False)
            rec_theta.append(np.concatenate([theta, eps[:, None]], axis=1))
            if n % RECORD_EVERY == 0:
                rec["coef"].append(c)
                rec["coef_mean"].append(cmean)
                rec["mu"].append(mu)
                rec["eps"].append(eps.copy())
                rec["delta"].append(delta.copy())
                rec["z"].append(z.copy())
                rec["pf"].append(pf if pf is not None else np.zeros((nc, m)))
            n += 1
            bar.update(1)
            if n >= min_sweeps and n % 250 == 0:
                tr = np.array(rec_theta)
                cols = [tr[..., j] for j in range(dh)] + ([tr[..., dh]] if faulty else [])
                if ang_sd:
                    dl = np.array(rec["delta"])
                    tau_d = RECORD_EVERY * autocorr_max(dl) if len(dl) >= 20 else np.inf
                else:
                    tau_d = 0.0
                tau_int = max(autocorr_max(np.stack(cols, axis=-1)) if cols else 0.0, tau_d)
                if n >= 50 * tau_int:
                    converged = True
                    break
    # --- equal-length thinned draws per chain ------------------------------------------------
    n_rec = len(rec["coef"])
    want = max(8, int(np.ceil(int(sampler.n_draws) / nc)))
    thin = max(1, n_rec // want)
    sel = np.arange(n_rec)[::thin][-want:]
    D_ = len(sel)

    def pick(key):
        a = np.array(rec[key])[sel]  # (D, nc, ...)
        return np.moveaxis(a, 0, 1)  # (nc, D, ...)

    rt = np.array(rec_theta)[::RECORD_EVERY][sel]  # (D, nc, dh+1)
    theta_d = np.moveaxis(rt[..., :dh], 0, 1)
    coef = pick("coef")
    mu = pick("mu")
    extra = {"posterior": {}, "sensor_vars": [], "diag_vars": [], "table": {}, "info": {},
             "priors": {}, "sampled": [], "mu": mu}
    # Integrated pointwise log-likelihood log p(y_i | y_-i, theta, latent_-i) for PSIS-LOO.
    flat_theta = theta_d.reshape(nc * D_, dh)
    tau, s, nu = hyper.unpack(flat_theta)
    zf = pick("z").reshape(nc * D_, m)
    nv = noise_rows(nu, zf)
    Dd = design(pick("delta").reshape(nc * D_, m)) if ang_sd else None
    mu_loo, var_loo = cm.loo_moments(tau, s, nv, design=Dd)
    yw = cm.yw[None, :]
    if faulty:
        epsf = pick("eps").reshape(nc * D_)
        sig2 = var_loo - nv
        lg = np.log1p(-epsf)[:, None] - 0.5 * (np.log(sig2 + (nu**2)[:, None])
                                              + (yw - mu_loo) ** 2 / (sig2 + (nu**2)[:, None]))
        lb = np.log(epsf)[:, None] - 0.5 * (np.log(sig2 + bad_w2[None, :])
                                            + (yw - mu_loo) ** 2 / (sig2 + bad_w2[None, :]))
        ll = np.logaddexp(lg, lb) - 0.5 * _LOG2PI + np.log(cm.w)[None, :]
    else:
        ll = (-0.5 * (_LOG2PI + np.log(var_loo) + (yw - mu_loo) ** 2 / var_loo)
              + np.log(cm.w)[None, :])
    extra["log_lik"] = ll.reshape(nc, D_, m)
    sd_rows = np.sqrt(nv) / cm.w[None, :]
    extra["y_rep_noise"] = (sd_rows * rng.standard_normal(sd_rows.shape)).reshape(nc, D_, m)
    if faulty:
        pf = pick("pf")
        eps_d = pick("eps")
        extra["posterior"].update(fault_rate=eps_d, fault_probability=pf)
        extra["sensor_vars"].append("fault_probability")
        extra["diag_vars"].append("fault_rate")
        extra["sampled"] += ["fault indicators", "fault_rate"]
        extra["table"]["fault_probability"] = pf.mean(axis=(0, 1))
        extra["priors"]["fault_rate"] = (f"Beta({a_eps:.3g}, {b_eps:.3g}) (prior mean "
                                         f"{rate:g})")
        extra["priors"]["sigma_bad"] = (f"faulty readings ~ Normal(model, {sigma_bad:.4g}^2)"
                                        + ("" if sampler.sigma_bad else
                                           " (larger of the readings' sd and 10x the noise)"))
        extra["info"]["sigma_bad"] = sigma_bad
    if ang_sd:
        dd = np.rad2deg(pick("delta"))
        extra["posterior"]["angle_offset_deg"] = dd
        extra["sensor_vars"].append("angle_offset_deg")
        extra["sampled"].append("sensor angle offsets")
        extra["table"]["angle_offset_deg_mean"] = dd.mean(axis=(0, 1))
        extra["table"]["angle_offset_deg_sd"] = dd.std(axis=(0, 1), ddof=1)
        extra["priors"]["angle_offset"] = (f"delta_i ~ Normal(0, {sampler.angle_sd_deg:g}^2) "
                                           f"degrees, independent per sensor")
    run = {"n_steps": n, "tau_int": tau_int, "converged": converged,
           "warmup_sweeps": WARMUP, "thin": thin * RECORD_EVERY, "n_chains": nc,
           "n_ensembles": K, "chains_per_ensemble": per,
           "sampler": "blocked Gibbs: collapsed random-walk Metropolis on the hyperparameters, "
                      "exact Gaussian coefficients" + (", Bernoulli fault indicators, Beta "
                                                       "fault rate" if faulty else "") +
                      (", per-sensor Metropolis angle offsets" if ang_sd else "")}
    return dict(theta=theta_d, ids=np.repeat(np.arange(K), per), coef=coef,
                coef_mean=pick("coef_mean"), noise_rows=None, run=run, extra=extra,
                chains=None)
