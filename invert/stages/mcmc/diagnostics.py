r"""arviz output and convergence diagnostics of the MCMC stage.

Builds one ``xarray.DataTree`` (posterior, per-sensor log-likelihood, posterior predictive,
observed data) and computes nested R-hat across independent ensembles, bulk and tail ESS, MCSE
and PSIS-LOO with per-sensor Pareto k, all with arviz 1.x.

Notes
-----
Walkers of one emcee ensemble (or chains of one superchain) are not independent chains; R-hat
is the nested R-hat of Margossian et al. [2]_ with the superchain = the ensemble, never R-hat
across the walkers of one ensemble. Thresholds follow Vehtari et al. [1]_: R-hat < 1.01, bulk
and tail ESS >= 400; Pareto k > 0.7 marks an unreliable leave-one-out estimate, i.e. an
influential sensor [3]_.

References
----------
.. [1] A. Vehtari, A. Gelman, D. Simpson, B. Carpenter and P.-C. Bürkner, "Rank-normalization,
       folding, and localization: an improved R-hat for assessing convergence of MCMC",
       Bayesian Analysis 16:667–718, 2021. doi:10.1214/20-BA1221
.. [2] C. C. Margossian, M. D. Hoffman, P. Sountsov, L. Riou-Durand, A. Vehtari and A. Gelman,
       "Nested R-hat: assessing the convergence of Markov chain Monte Carlo when running many
       short chains", arXiv:2110.13017.
.. [3] A. Vehtari, A. Gelman and J. Gabry, "Practical Bayesian model evaluation using
       leave-one-out cross-validation and WAIC", Statistics and Computing 27:1413–1432, 2017.
       doi:10.1007/s11222-016-9696-4
"""

from __future__ import annotations

import warnings

import numpy as np

#: Convergence thresholds (Vehtari et al. 2021): R-hat below 1.01, bulk and tail ESS >= 400.
RHAT_MAX = 1.01
ESS_MIN = 400
#: Pareto k above 0.7: importance sampling for leave-one-out is unreliable (Vehtari et al. 2017).
PARETO_K_MAX = 0.7


def integrated_time(chain, c=5.0):
    r"""Integrated autocorrelation time of each parameter of an ensemble chain.

    The estimator of emcee's ``autocorr.integrated_time`` (Foreman-Mackey et al. 2013): the
    normalised autocorrelation function of every walker, by FFT, averaged over the walkers;
    :math:`\tau(M) = 1 + 2\sum_{t=1}^{M}\hat\rho(t)` with Sokal's automatic window, the
    smallest :math:`M \ge c\,\tau(M)`. Computed for all walkers at once (one FFT call per
    parameter rather than one per walker and parameter).

    Parameters
    ----------
    chain : ndarray of shape (n_steps, n_walkers, n_dim)
    c : float, default=5

    Returns
    -------
    ndarray of shape (n_dim,)
        ``nan`` for a parameter whose walkers do not move at all.

    References
    ----------
    A. D. Sokal, "Monte Carlo methods in statistical mechanics: foundations and new
    algorithms", 1997 (the automatic window).
    """
    from scipy import fft

    x = np.asarray(chain, float)
    n = x.shape[0]
    # Zero-padding to >= 2n - 1 makes the circular correlation the linear one; any such
    # length gives the same result, so take a fast one rather than a power of two.
    nfft = fft.next_fast_len(2 * n - 1, real=True)
    out = np.empty(x.shape[2])
    for j in range(x.shape[2]):
        xj = x[:, :, j] - x[:, :, j].mean(axis=0)
        f = fft.rfft(xj, n=nfft, axis=0)
        acf = fft.irfft(f.real**2 + f.imag**2, n=nfft, axis=0)[:n]
        with np.errstate(invalid="ignore", divide="ignore"):
            rho = (acf / acf[0]).mean(axis=1)
        taus = 2.0 * np.cumsum(rho) - 1.0
        small = np.arange(n) < c * taus
        window = int(np.argmin(small)) if small.any() else n - 1
        out[j] = taus[window]
    return out


def coefficient_names(degrees):
    """Names ``a0, a1, b1, ...`` for a disk-ordered coefficient vector (``c{j}`` otherwise)."""
    deg = np.asarray(degrees)
    names, seen = [], {}
    for n in deg:
        k = seen.get(int(n), 0)
        seen[int(n)] = k + 1
        if n == 0 and k == 0:
            names.append("a0")
        elif k == 0:
            names.append(f"a{n}")
        elif k == 1:
            names.append(f"b{n}")
        else:
            names.append(f"c{len(names)}")
    if len(set(names)) != len(names):
        names = [f"c{j}" for j in range(len(deg))]
    return names


def build_tree(problem, posterior, log_lik, y_rep, *, sensor_vars=(), attrs=None):
    """One DataTree with posterior, log_likelihood, posterior_predictive and observed_data.

    Parameters
    ----------
    problem : LinearProblem
    posterior : dict of name -> ndarray (chain, draw, ...)
        ``coef`` has a trailing coefficient axis; names in ``sensor_vars`` a sensor axis.
    log_lik, y_rep : ndarray of shape (chain, draw, n_readings)
        Pointwise log-likelihood of each reading and posterior-predictive readings.
    """
    import arviz as az

    sensors = [str(s) for s in problem.sensor]
    if len(set(sensors)) != len(sensors):
        sensors = [f"{s}#{i}" for i, s in enumerate(sensors)]
    dims = {"coef": ["coefficient"], "y": ["sensor"]}
    dims.update({v: ["sensor"] for v in sensor_vars})
    coords = {"sensor": sensors, "coefficient": coefficient_names(problem.degrees)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dt = az.from_dict(
            {
                "posterior": posterior,
                "log_likelihood": {"y": log_lik},
                "posterior_predictive": {"y": y_rep},
                "observed_data": {"y": np.asarray(problem.y)},
            },
            dims=dims, coords=coords, attrs=attrs or {},
        )
    return dt


def convergence(dt, superchain_ids, var_names):
    """Summarise convergence: nested R-hat, ESS and MCSE.

    Nested R-hat, bulk/tail ESS and MCSE of the mean for ``var_names`` (scalars), plus the
    worst value over the coefficients. Returns a dict for ``Estimate.info``.
    """
    import arviz as az

    ids = [int(v) for v in superchain_ids]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rhat = az.rhat_nested(dt, var_names=list(var_names) + ["coef"], superchain_ids=ids)
        bulk = az.ess(dt, var_names=list(var_names) + ["coef"], method="bulk")
        tail = az.ess(dt, var_names=list(var_names) + ["coef"], method="tail")
        mcse = az.mcse(dt, var_names=list(var_names) + ["coef"], method="mean")
    out = {"rhat": {}, "ess_bulk": {}, "ess_tail": {}, "mcse_mean": {}}
    for v in var_names:
        out["rhat"][v] = float(rhat[v].values)
        out["ess_bulk"][v] = float(bulk[v].values)
        out["ess_tail"][v] = float(tail[v].values)
        out["mcse_mean"][v] = float(mcse[v].values)
    out["rhat"]["coef_max"] = float(np.nanmax(rhat["coef"].values))
    out["ess_bulk"]["coef_min"] = float(np.nanmin(bulk["coef"].values))
    out["ess_tail"]["coef_min"] = float(np.nanmin(tail["coef"].values))
    return out


def convergence_warnings(diag):
    """Warnings for R-hat > RHAT_MAX and ESS < ESS_MIN."""
    notes = []
    bad_r = {k: v for k, v in diag["rhat"].items() if not (v <= RHAT_MAX)}
    if bad_r:
        names = ", ".join(f"{k} ({v:.3g})" for k, v in bad_r.items())
        notes.append(f"nested R-hat above {RHAT_MAX:.2f} for {names}; the ensembles disagree, so "
                     f"the posterior is not yet explored. Try a larger max_steps (--max-steps).")
    for kind in ("ess_bulk", "ess_tail"):
        bad = {k: v for k, v in diag[kind].items() if not (v >= ESS_MIN)}
        if bad:
            names = ", ".join(f"{k} ({v:.0f})" for k, v in bad.items())
            notes.append(f"{kind.split('_')[1]} ESS below {int(ESS_MIN):d} for {names}; Monte "
                         f"Carlo error is large. Try a larger max_steps or n_draws.")
    return notes


def psis_loo(dt):
    """PSIS-LOO: ``(summary dict, pareto_k per reading)``."""
    import arviz as az

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = az.loo(dt, pointwise=True)
    k = np.asarray(res.pareto_k.values, float)
    summary = {"elpd_loo": float(res.elpd), "se": float(res.se), "p_loo": float(res.p),
               "pareto_k_max": float(np.max(k)), "good_k": float(res.good_k)}
    return summary, k


def pareto_warning(problem, k):
    """Warning naming every sensor with Pareto k above PARETO_K_MAX, or None."""
    bad = np.flatnonzero(k > PARETO_K_MAX)
    if not bad.size:
        return None
    names = ", ".join(f"{problem.sensor[i]} ({k[i]:.2f})" for i in bad)
    return (f"PSIS-LOO Pareto k above {PARETO_K_MAX} for sensor(s) {names}: these readings are "
            f"highly influential (the fit changes much without them); check them")
