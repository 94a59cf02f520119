"""Dense sensing: time and peak memory of every snapshot stage at 1e3 ... 1e6 readings.

SYNTHETIC readings (80 % on the rim, 20 % inside; sigma 0.05) of a smooth field on the unit
disk. For each size the script times, with the peak of traced memory (tracemalloc, numpy's
allocations included), the Tikhonov stage with the evidence and the leave-one-out rules, the
Gaussian stage, the MCMC stage (``--mcmc-steps`` steps; skipped at 1e6, whose time is that of
1e5: after one pass for the factor its work does not depend on the number of readings), the
diagnostics (model check with exact LOO, depth, gaps, exceedance) and advise. The ratios to
the next smaller size show linear growth (10x the readings: about 10x the time and memory).

Run: python bench/bench_dense.py [--sizes 1000 10000 100000 1000000] [--mcmc-steps 500]
"""

import argparse
import time
import tracemalloc
import warnings

import numpy as np

from invert import LinearProblem
from invert.diagnostics.advise import advise
from invert.diagnostics.diagnose import diagnose
from invert.workflow import make_domain, run_stage


def synthetic_problem(m, rng):
    """Return readings of a smooth field (SYNTHETIC) at ``m`` random points."""
    d = make_domain(1.0, s=2.0)
    th = rng.uniform(0, 2 * np.pi, m)
    rho = np.where(rng.random(m) < 0.8, 1.0, rng.uniform(0.0, 0.95, m))
    pts = np.column_stack([rho * np.cos(th), rho * np.sin(th)])
    c = np.zeros(d.n_coef)
    c[[0, 1, 4]] = [20.0, 1.0, 0.3]
    y = d.field(c, pts) + 0.05 * rng.standard_normal(m)
    return LinearProblem(d.design(pts), y, np.full(m, 0.05), d.degrees, d.eigenvalues, d,
                         points=pts)


def measure(fn):
    """Run ``fn`` once; return (seconds, peak traced MB)."""
    tracemalloc.start()
    t0 = time.perf_counter()
    fn()
    dt = time.perf_counter() - t0
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return dt, peak / 1e6


def jobs(prob, est, steps):
    """Return the timed steps for one problem."""
    return {
        "tikhonov evidence": lambda: run_stage(prob, "tikhonov"),
        "tikhonov loo": lambda: run_stage(prob, "tikhonov", rule="loo"),
        "gaussian": lambda: run_stage(prob, "gaussian"),
        "mcmc": lambda: run_stage(prob, "mcmc", seed=1, min_steps=steps, max_steps=steps,
                                  n_draws=500),
        "diagnostics": lambda: diagnose(est, prob, threshold=21.5, rng=0),
        "advise": lambda: advise(est, prob),
    }


def main():
    """Print the table and the growth ratios."""
    ap = argparse.ArgumentParser()
    ap.add_argument("--sizes", type=int, nargs="+", default=[1000, 10000, 100000, 1000000])
    ap.add_argument("--mcmc-steps", type=int, default=500)
    args = ap.parse_args()
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(0)
    rows = {}
    for m in args.sizes:
        prob = synthetic_problem(m, rng)
        est = run_stage(prob, "tikhonov")
        for name, fn in jobs(prob, est, args.mcmc_steps).items():
            if name == "mcmc" and m >= 1_000_000:
                print(f"{m:>8d}  {name:18s}  skipped (its time is that of 1e5: the work after "
                      f"the one-pass factor does not depend on m)", flush=True)
                continue
            t, mb = measure(fn)
            prev = rows.get((name, m // 10))
            ratio = f"x{t / prev[0]:5.1f} time  x{mb / prev[1]:5.1f} memory" if prev else ""
            rows[(name, m)] = (t, mb)
            print(f"{m:>8d}  {name:18s} {t:9.2f} s {mb:9.1f} MB   {ratio}", flush=True)
        del prob, est
    print("ratios: against the size 10x smaller (linear growth: about x10)")


if __name__ == "__main__":
    main()
