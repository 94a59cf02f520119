"""Speed of the MCMC stage, measured in one run.

1. Effective samples per second of the collapsed sampler (hyperparameters by emcee with the
   coefficients integrated out, exact conditional coefficient draws) against emcee over the
   hyperparameters and all coefficients, on the same problem: the bundled demo readings with
   the smoothness held at s = 2.5 (11 harmonics, 23 coefficients, so that the all-coefficient
   baseline can converge at all), then at s = 2 (22 harmonics, 45 coefficients). ESS is
   arviz's bulk ESS, the smallest over tau and the query points; wall time is the whole fit
   (mode search, sampling, draws, diagnostics). Both samplers must give the same query answers
   (differences reported in units of their combined Monte Carlo standard error).
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
    return est, q, wall, ess


def compare(s):
    problem, pts, labels = _demo_problem(s)
    print(f"\nproblem: demo readings, {problem.n_readings} used, {problem.n_coef} coefficients, "
          f"s fixed at {s}")
    # Both keep up to 20000 draws so that thinning does not cap the ESS of either.
    col, qc, tc, ec = _run(problem, pts, s, rng=1, n_draws=20000)
    full, qf, tf, ef = _run(problem, pts, s, rng=2, collapsed=False, n_draws=20000,
                            max_steps=60000)
    print(f"{'sampler':<28}{'steps':>8}{'tau_int':>9}{'wall s':>9}{'min ESS':>9}{'ESS/s':>9}")
    for name, est, wall, ess in (("collapsed (2-D emcee)", col, tc, ec),
                                 ("all coefficients (emcee)", full, tf, ef)):
        run = est.info["sampling"]
        print(f"{name:<28}{run['n_steps']:>8}{run['tau_int']:>9.1f}{wall:>9.1f}{ess:>9.0f}"
              f"{ess / wall:>9.1f}")
    print(f"all-coefficient run converged (>= 50 tau): {full.info['sampling']['converged']}")
    ratio = (ec / tc) / (ef / tf)
    print(f"ESS per second, collapsed / all coefficients: {ratio:.0f}x (target >= 50x)")
    # Second count, independent of how many draws are kept: emcee's walkers x post-burn-in
    # steps / integrated autocorrelation time (hyperparameters for the collapsed sampler).
    chain_ess = []
    for est in (col, full):
        run = est.info["sampling"]
        chain_ess.append(run["n_ensembles"] * run["nwalkers"] * (run["n_steps"] - run["burn"])
                         / run["tau_int"])
    ratio2 = (chain_ess[0] / tc) / (chain_ess[1] / tf)
    print(f"same with ESS = walkers x steps / tau_int ({chain_ess[0]:.0f} vs "
          f"{chain_ess[1]:.0f}): {ratio2:.0f}x")
    se_m = np.hypot(az.mcse(qc, method="mean", chain_axis=0, draw_axis=1),
                    az.mcse(qf, method="mean", chain_axis=0, draw_axis=1))
    se_s = np.hypot(az.mcse(qc, method="sd", chain_axis=0, draw_axis=1),
                    az.mcse(qf, method="sd", chain_axis=0, draw_axis=1))
    print(f"{'query':<14}{'mean coll.':>11}{'mean all':>11}{'sd coll.':>10}{'sd all':>10}"
          f"{'dmean/se':>10}{'dsd/se':>8}")
    for i, lab in enumerate(labels):
        mc, mf = qc[..., i].mean(), qf[..., i].mean()
        sc, sf = qc[..., i].std(ddof=1), qf[..., i].std(ddof=1)
        print(f"{lab:<14}{mc:>11.3f}{mf:>11.3f}{sc:>10.3f}{sf:>10.3f}"
              f"{(mc - mf) / se_m[i]:>10.2f}{(sc - sf) / se_s[i]:>8.2f}")
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
