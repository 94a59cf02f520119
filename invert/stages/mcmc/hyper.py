r"""The sampled hyperparameters of the MCMC stage, their prior, and the Laplace start.

Notes
-----
:math:`\theta = (\log\tau, s, \log\nu)` (the fixed ones left out). Weakly informative priors:
:math:`\log\tau \sim N(\log S_y, 2.5^2)` with :math:`S_y` the sd of the readings;
:math:`s \sim U(s_{lo}, s_{hi})`; a common noise sd :math:`\log\nu \sim N(\log(S_y/10), 3^2)`;
a noise scale factor on given sigmas :math:`\log\nu \sim N(0, 1)`. The walkers start around
the posterior mode, with the Laplace approximation there (inverse negative Hessian by central
differences; Gelman et al. 2013, §4.1).

References
----------
.. [1] A. Gelman et al., *Bayesian Data Analysis*, 3rd ed., CRC Press, 2013, §4.1.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

__all__ = ["Hyper", "laplace", "num_hessian"]

_LOG2PI = float(np.log(2 * np.pi))


class Hyper:
    """Sampled hyperparameter vector <-> (tau, s, nu), and its weakly informative prior.

    Parameters
    ----------
    problem : LinearProblem
    s_bounds : (float, float)
        Support of the uniform prior on ``s``.
    tau, s, noise_sd : float, optional
        Hold a hyperparameter fixed instead of sampling it.
    fit_noise_scale : bool, default=False
        With given sigmas, sample a common factor on them.
    """

    def __init__(self, problem, s_bounds, *, tau=None, s=None, noise_sd=None,
                 fit_noise_scale=False):
        self.known = problem.sigma is not None
        y = problem.y
        self.scale_y = float(np.std(y)) if np.std(y) > 0 else 1.0
        self.s_bounds = s_bounds
        self.fixed = {"tau": tau, "s": s}
        names = []
        if tau is None:
            names.append("log_tau")
        if s is None:
            names.append("s")
        if self.known:
            self.noise_name = "noise_scale"
            self.fixed["noise"] = None if fit_noise_scale else 1.0
            self.noise_prior = (0.0, 1.0)
        else:
            self.noise_name = "noise_sd"
            self.fixed["noise"] = noise_sd
            self.noise_prior = (float(np.log(self.scale_y / 10)), 3.0)
        if self.fixed["noise"] is None:
            names.append("log_noise")
        self.names = names
        self.tau_prior = (float(np.log(self.scale_y)), 2.5)

    @property
    def ndim(self):
        """Number of sampled hyperparameters."""
        return len(self.names)

    def unpack(self, theta):
        """``(tau, s, nu)`` arrays, one entry per row of ``theta`` (fixed ones broadcast)."""
        theta = np.atleast_2d(theta)
        nb = theta.shape[0]
        col = {n: theta[:, i] for i, n in enumerate(self.names)}
        with np.errstate(over="ignore"):
            tau = np.exp(col["log_tau"]) if "log_tau" in col else np.full(nb, self.fixed["tau"])
            s = col["s"] if "s" in col else np.full(nb, self.fixed["s"])
            nu = np.exp(col["log_noise"]) if "log_noise" in col else \
                np.full(nb, self.fixed["noise"])
        return tau, s, nu

    def pack(self, tau, s, nu):
        """Pack one ``(tau, s, nu)`` into the sampled vector."""
        vals = {"log_tau": np.log(tau), "s": s, "log_noise": np.log(nu)}
        return np.array([vals[n] for n in self.names], dtype=float)

    def log_prior(self, theta):
        """Log prior density of each row of ``theta`` (``-inf`` outside the support)."""
        theta = np.atleast_2d(theta)
        lp = np.zeros(theta.shape[0])
        for i, n in enumerate(self.names):
            x = theta[:, i]
            if n == "s":
                lo, hi = self.s_bounds
                lp = np.where((x > lo) & (x < hi), lp - np.log(hi - lo), -np.inf)
            else:
                mu, sd = self.tau_prior if n == "log_tau" else self.noise_prior
                ok = np.abs(x) < 60  # keeps exp() finite; far outside any prior mass
                lp = np.where(ok, lp - 0.5 * ((x - mu) / sd) ** 2 - np.log(sd) - 0.5 * _LOG2PI,
                              -np.inf)
        return lp

    def describe(self):
        """Describe the priors in words, for ``info["priors"]``."""
        out = {}
        if "log_tau" in self.names:
            out["tau"] = (f"log tau ~ Normal({self.tau_prior[0]:.4g}, {self.tau_prior[1]}^2) "
                          f"(centred on the log sd of the readings)")
        else:
            out["tau"] = f"fixed at {self.fixed['tau']}"
        if "s" in self.names:
            out["s"] = f"s ~ Uniform({self.s_bounds[0]:.4g}, {self.s_bounds[1]:.4g})"
        else:
            out["s"] = f"fixed at {self.fixed['s']}"
        if "log_noise" in self.names:
            out[self.noise_name] = (f"log {self.noise_name} ~ Normal({self.noise_prior[0]:.4g},"
                                    f" {self.noise_prior[1]}^2)")
        else:
            out[self.noise_name] = f"fixed at {self.fixed['noise']}"
        out["mean_level"] = "a0 ~ Normal(0, (1e4 tau)^2) (effectively flat)"
        return out


def num_hessian(f, x, h=1e-3):
    """Central-difference Hessian of a batched scalar function ``f`` at ``x``."""
    d = x.size
    E = np.eye(d) * h
    pts = [x]
    for i in range(d):
        for j in range(d):
            pts += [x + E[i] + E[j], x + E[i] - E[j], x - E[i] + E[j], x - E[i] - E[j]]
    v = f(np.array(pts))
    if not np.all(np.isfinite(v)):
        raise np.linalg.LinAlgError("non-finite log density near the mode")
    H = np.empty((d, d))
    k = 1
    for i in range(d):
        for j in range(d):
            H[i, j] = (v[k] - v[k + 1] - v[k + 2] + v[k + 3]) / (4 * h * h)
            k += 4
    return 0.5 * (H + H.T)


def laplace(logp, x0, bounds):
    """Mode of ``logp`` from ``x0`` (L-BFGS-B) and the inverse negative Hessian there."""
    res = optimize.minimize(lambda x: -float(logp(x[None])[0]), x0, method="L-BFGS-B",
                            bounds=bounds)
    x = res.x if np.isfinite(res.fun) and res.fun <= -float(logp(x0[None])[0]) else x0
    # Keep the difference stencil inside the bounds (s may sit at its end).
    lo = np.array([b[0] for b in bounds]) + 2e-3
    hi = np.array([b[1] for b in bounds]) - 2e-3
    x = np.clip(x, lo, hi)
    try:
        H = num_hessian(logp, x)
        w, V = np.linalg.eigh(-H)
        if not np.all(np.isfinite(w)) or w.min() <= 0:
            raise np.linalg.LinAlgError
        cov = (V / w) @ V.T
    except np.linalg.LinAlgError:
        cov = np.eye(x.size) * 0.01
    return x, cov
