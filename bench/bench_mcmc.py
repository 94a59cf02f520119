"""Speed of the MCMC stage, measured in one run.

1. Effective samples per second of the collapsed sampler (emcee over the hyperparameters with
   the coefficients integrated out, then exact conditional coefficient draws) against emcee
   over the hyperparameters and all coefficients, on the same problem: the bundled demo
   readings with the smoothness held at s = 2.5 (11 harmonics, 23 coefficients, so that the
   all-coefficient baseline converges in a few thousand steps), then at s = 2 (22 harmonics,
   45 coefficients).

   How it is counted. Each sampler runs long enough that fixed start-up costs are a small
   share of its time: the baseline with its defaults until its chains are 50 autocorrelation
   times long, the collapsed sampler for 2,000 steps (about 1,000 of its autocorrelation
   times; by default it stops after its 500-step minimum), both with 4 ensembles. ESS is
   arviz's bulk ESS, the smallest over tau and the query points, on the kept draws: every
   draw of the collapsed sampler, and 80,000 of the baseline's (thinned by about a quarter of
   its autocorrelation time, so that thinning costs it little ESS; emcee's own count, walkers
   x steps / tau_int, is printed too). Time is the sampler's: mode search, sampling with its
   convergence checks, and the coefficient draws; the arviz summaries computed afterwards
   (R-hat, ESS, PSIS-LOO over every kept draw) are reported separately, and the ratio over
   the whole fit is printed too. Both samplers must give the same query answers (differences
   in units of their combined Monte Carlo standard error) and, when only tau is sampled, the
   exact values by quadrature over log tau. A warm-up fit loads the libraries
   first, so that neither run pays for imports.
2. Wall time of a default ``rim-invert demo --method mcmc`` (a new process, as a user runs it),
   against the one-minute budget.

Run:

    python bench/bench_mcmc.py [s ...]      (default: 2.5 2.0)
"""

import subprocess
import sys
import tempfile
import time
import warnings
from pathlib import Path

import arviz as az
import numpy as np

from invert import LinearProblem, MCMCSampler, load_points, load_readings, make_domain


def _demo_problem(s):
    from importlib import resources

    data = resources.files("invert") / "data"
    with resources.as_file(data / "demo_readings.csv") as rp, \
            resources.as_file(data / "demo_query.csv") as qp:
        readings = load_readings(rp)
        pts, labels, _ = load_points(qp)
    domain = make_domain(0.25, s=s)
    return LinearProblem.from_readings(readings, domain), pts, labels


def _run(problem, pts, s, **kw):
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = MCMCSampler(s=s, progress=False, **kw).fit(problem)
    wall = time.perf_counter() - t0
    dt = est.extras["posterior"]
    q = dt["posterior"]["coef"].values @ est.domain.design(pts).T  # (chain, draw, n_query)
    ess_q = az.ess(q, method="bulk", chain_axis=0, draw_axis=1)
    ess_tau = float(az.ess(dt, var_names=["tau"], method="bulk")["tau"].values)
    ess = float(min(ess_tau, np.min(ess_q)))
    t = est.extras["timing_s"]
    return dict(est=est, q=q, wall=wall, ess=ess,
                sampler_s=t["mode_search"] + t["sampling_and_draws"], diag_s=t["diagnostics"])


def _chain_ess(est):
    """emcee's count: walkers x post-burn-in steps / integrated autocorrelation time."""
    run = est.info["sampling"]
    return run["n_ensembles"] * run["nwalkers"] * (run["n_steps"] - run["burn"]) / run["tau_int"]


def _quadrature(problem, pts, s):
    """Exact query means and sds when only tau is sampled (s fixed, sigma given): quadrature
    over a fine grid of log tau of the Gaussian conditional moments (Bishop 2006, eqs.
    3.53-3.54; law of total variance). None when more than tau is sampled."""
    from invert.stages.mcmc.collapsed import CollapsedModel
    from invert.stages.mcmc.hyper import Hyper as _Hyper

    smp = MCMCSampler(s=s, progress=False)
    prob, hyper, _ = smp._setup(problem, [])
    if hyper.names != ["log_tau"]:
        return None
    cm = CollapsedModel(prob, spectral=False)
    grid = np.linspace(-10, 15, 25001)
    lp = MCMCSampler._logp_collapsed(grid[:, None], hyper, cm)
    w = np.exp(lp - lp.max())
    w /= w.sum()
    H = prob.domain.design(pts)
    Ni = 1.0 / prob.sigma**2
    GtNG = prob.G.T @ (Ni[:, None] * prob.G)
    GtNy = prob.G.T @ (Ni * prob.y)
    m1 = np.zeros(len(pts))
    m2 = np.zeros(len(pts))
    for lt, wi in zip(grid[w > 1e-13], w[w > 1e-13], strict=True):
        Sig = np.linalg.inv(np.diag(1 / cm.prior_var(np.exp(lt), s)[0]) + GtNG)
        mu = H @ Sig @ GtNy
        m1 += wi * mu
        m2 += wi * (np.einsum("qi,ij,qj->q", H, Sig, H) + mu**2)
    return m1, np.sqrt(m2 - m1**2)


def compare(s):
    problem, pts, labels = _demo_problem(s)
    _run(problem, pts, s, rng=0, n_draws=200)  # warm-up: imports, caches
    full = _run(problem, pts, s, rng=2, collapsed=False, n_draws=80000, max_steps=60000)
    fi = full["est"].info["sampling"]
    n_base = int(fi["n_steps"])
    K, nw, n = 4, 64, 2000
    col = _run(problem, pts, s, rng=1, n_draws=K * nw * (n - n // 4), min_steps=n, max_steps=n)
    print(f"\nproblem: demo readings, {problem.n_readings} used, {problem.n_coef} coefficients, "
          f"s fixed at {s}; steps x 4 ensembles: {n} collapsed, {n_base} all coefficients")
    print(f"{'sampler':<34}{'walkers':>8}{'tau_int':>8}{'min ESS':>9}{'sampler s':>10}"
          f"{'ESS/s':>9}{'diag. s':>8}{'whole s':>8}{'ESS/s':>8}")
    dh = len(col["est"].info["sampled"])
    rows = (("collapsed (%d-D emcee)" % dh, col),
            ("all coefficients (%d-D emcee)" % (dh + problem.n_coef), full))
    for name, r in rows:
        run = r["est"].info["sampling"]
        print(f"{name:<34}{run['nwalkers']:>8}{run['tau_int']:>8.1f}{r['ess']:>9.0f}"
              f"{r['sampler_s']:>10.1f}{r['ess'] / r['sampler_s']:>9.0f}{r['diag_s']:>8.1f}"
              f"{r['wall']:>8.1f}{r['ess'] / r['wall']:>8.0f}")
    print(f"all-coefficient run converged (>= 50 tau): {fi['converged']}")
    ratio = (col["ess"] / col["sampler_s"]) / (full["ess"] / full["sampler_s"])
    print(f"ESS per second of sampler time, collapsed / all coefficients: {ratio:.0f}x "
          f"(target >= 50x)")
    whole = (col["ess"] / col["wall"]) / (full["ess"] / full["wall"])
    print(f"same over the whole fit (arviz summaries of every kept draw included): {whole:.0f}x")
    ce = [_chain_ess(r["est"]) for r in (col, full)]
    ratio2 = (ce[0] / col["sampler_s"]) / (ce[1] / full["sampler_s"])
    print(f"same with ESS = walkers x steps / tau_int ({ce[0]:.0f} vs {ce[1]:.0f}): "
          f"{ratio2:.0f}x")
    qc, qf = col["q"], full["q"]
    se_m = np.hypot(az.mcse(qc, method="mean", chain_axis=0, draw_axis=1),
                    az.mcse(qf, method="mean", chain_axis=0, draw_axis=1))
    se_s = np.hypot(az.mcse(qc, method="sd", chain_axis=0, draw_axis=1),
                    az.mcse(qf, method="sd", chain_axis=0, draw_axis=1))
    exact = _quadrature(problem, pts, s)
    print(f"{'query':<14}{'mean coll.':>11}{'mean all':>11}{'sd coll.':>10}{'sd all':>10}"
          f"{'dmean/se':>10}{'dsd/se':>8}" + (f"{'exact mean':>12}{'exact sd':>10}"
                                              if exact else ""))
    for i, lab in enumerate(labels):
        mc, mf = qc[..., i].mean(), qf[..., i].mean()
        sc, sf = qc[..., i].std(ddof=1), qf[..., i].std(ddof=1)
        print(f"{lab:<14}{mc:>11.3f}{mf:>11.3f}{sc:>10.3f}{sf:>10.3f}"
              f"{(mc - mf) / se_m[i]:>10.2f}{(sc - sf) / se_s[i]:>8.2f}" +
              (f"{exact[0][i]:>12.3f}{exact[1][i]:>10.3f}" if exact else ""))
    if exact:
        for name, q in (("collapsed", qc), ("all coefficients", qf)):
            zm = (q.mean(axis=(0, 1)) - exact[0]) / az.mcse(q, method="mean", chain_axis=0,
                                                             draw_axis=1)
            zs = (q.std(axis=(0, 1), ddof=1) - exact[1]) / az.mcse(q, method="sd", chain_axis=0,
                                                                    draw_axis=1)
            print(f"{name}: largest |error| / its own MCSE against the exact values: mean "
                  f"{np.max(np.abs(zm)):.1f}, sd {np.max(np.abs(zs)):.1f}")
    return ratio


def main(smoothness=(2.5, 2.0)):
    for s in smoothness:
        compare(s)

    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        r = subprocess.run([sys.executable, "-m", "invert.cli", "demo", "--method", "mcmc",
                            "--out", str(Path(tmp) / "demo")], capture_output=True, text=True)
        wall = time.perf_counter() - t0
    if r.returncode:
        print(f"rim-invert demo --method mcmc failed: {r.stderr.strip().splitlines()[-1]}")
    else:
        print(f"rim-invert demo --method mcmc: {wall:.1f} s wall (budget 60 s; "
              f"{wall / 60:.2f} of it)")


if __name__ == "__main__":
    main(tuple(float(v) for v in sys.argv[1:]) or (2.5, 2.0))
