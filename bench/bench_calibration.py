"""Coverage and interval score of the default fit over the families of truths a user meets.

SYNTHETIC, seeded. A disk of radius 1 with 24 rim sensors, a gap of a sixth of the ring (4 of
them missing) and 4 interior probes, noise sd 0.05 (given). Families (each named in the output):

prior       truth drawn from the smoothness prior (s = 2, tau = 1, mean 20)
step        a rim step of height 2 along a random quarter arc (its harmonic extension)
source      a line source just outside the rim, u = -log|x - x0| with |x0| = 1.15
trend       that source plus a linear trend of slope 1
each clean and with one faulty rim sensor (reading 10 noise sd high); then the prior family
with interior probes only (no rim reading) and with one rim reading written as -9999.

For each family: the share of 90 % intervals covering the truth at interior points (r <= 0.8)
and at rim points inside the gap, and the mean interval score (Gneiting & Raftery 2007, eq. 43:
width + (2/alpha) * distance of a miss), with how often a sensor was named. Run:

    python bench/bench_calibration.py [n_trials] [--ordinary]    (default 20 trials)

``--ordinary`` runs the Tikhonov stage without the robust step (gross errors, faulty sensors);
``--method NAME`` runs another stage through the same robust wrapper as ``fit`` does
(``--method averaged``: the hyperparameter-averaged posterior with suspects mixed in;
``--method tikhonov-upre``: Tikhonov with the noise known and lambda by UPRE, no robust step,
the reference of the interval-score goal). A sensor counts as named when the fit names it
in ``robust`` (excluded) or as a suspect of probability >= NAME_PROBABILITY (0.9).

References
----------
T. Gneiting and A. E. Raftery, "Strictly proper scoring rules, prediction, and estimation",
JASA 102:359-378, 2007. doi:10.1198/016214506000001437
"""

import sys
import warnings

import numpy as np

from invert import LinearProblem
from invert.prior import SmoothnessPrior
from invert.stages.suspects import NAME_PROBABILITY
from invert.workflow import make_domain, robust_stage, run_stage

LEVEL, SIGMA, N_RIM, GAP = 0.9, 0.05, 24, 4
FAMILIES = ("prior", "step", "source", "trend")
#: ``--ordinary``: the stage without the robust step, for comparison.
ORDINARY = "--ordinary" in sys.argv
METHOD = sys.argv[sys.argv.index("--method") + 1] if "--method" in sys.argv else "tikhonov"


def interval_score(lo, hi, x, alpha=1 - LEVEL):
    """Interval score of central (1 - alpha) intervals (Gneiting & Raftery 2007, eq. 43)."""
    return (hi - lo) + (2 / alpha) * (np.maximum(lo - x, 0) + np.maximum(x - hi, 0))


def truth_function(kind, rng, d):
    """Return a callable points -> field values for the family ``kind``."""
    if kind == "prior":
        v = SmoothnessPrior(s=2.0, tau=1.0).variances(d.eigenvalues, d.degrees)
        v[0] = 1.0
        c = np.sqrt(v) * rng.standard_normal(d.n_coef)
        c[0] += 20.0
        return lambda p: d.design(p) @ c
    if kind == "step":
        a = rng.uniform(0, 2 * np.pi)
        b = a + np.pi / 2
        n = np.arange(1, 400)
        an = (np.sin(n * b) - np.sin(n * a)) / (n * np.pi)
        bn = (np.cos(n * a) - np.cos(n * b)) / (n * np.pi)

        def step(p):
            r, th = np.hypot(p[:, 0], p[:, 1]), np.arctan2(p[:, 1], p[:, 0])
            inside = 2.0 * (0.25 + (r[:, None] ** n * (an * np.cos(np.outer(th, n))
                                                        + bn * np.sin(np.outer(th, n)))).sum(1))
            on_arc = 2.0 * (np.mod(th - a, 2 * np.pi) < np.pi / 2)
            return 20.0 + np.where(r > 1 - 1e-9, on_arc, inside)  # exact indicator on the rim
        return step
    phi = rng.uniform(0, 2 * np.pi)
    x0 = 1.15 * np.array([np.cos(phi), np.sin(phi)])
    slope = 1.0 if kind == "trend" else 0.0
    direction = rng.uniform(0, 2 * np.pi)
    e = np.array([np.cos(direction), np.sin(direction)])
    return lambda p: 20.0 - np.log(np.hypot(*(p - x0).T)) + slope * (p @ e)


def trial(rng, d, kind, fault=None, interior_only=False):
    """One seeded fit: coverage and interval score at interior and gap points, exclusions."""
    f = truth_function(kind, rng, d)
    th = np.linspace(0, 2 * np.pi, N_RIM, endpoint=False) + rng.uniform(0, 2 * np.pi)
    rim = d.from_polar(1.0, th[GAP:])
    gap = d.from_polar(1.0, np.linspace(th[0], th[GAP], 9)[1:-1])
    probes = d.from_polar(0.5, np.linspace(0, 2 * np.pi, 4, endpoint=False) + 0.3)
    pts = probes if interior_only else np.vstack([rim, probes])
    y = f(pts) + SIGMA * rng.standard_normal(len(pts))
    if fault == "faulty":
        y[0] += 10 * SIGMA
    elif fault == "sentinel":
        y[0] = -9999.0
    pb = LinearProblem(d.design(pts), y, np.full(len(pts), SIGMA), d.degrees, d.eigenvalues, d,
                       points=pts)
    if ORDINARY:
        est = run_stage(pb, "tikhonov", rule="evidence")
    elif METHOD == "tikhonov-upre":
        est = run_stage(pb, "tikhonov", rule="upre")
    elif METHOD == "tikhonov":
        est, _ = robust_stage(pb, "tikhonov", rule="evidence")
    else:
        est, _ = robust_stage(pb, METHOD)
    inner = d.from_polar(0.8 * np.sqrt(rng.uniform(0, 1, 12)), rng.uniform(0, 2 * np.pi, 12))
    rob = est.info.get("robust", {})
    sus = est.info.get("suspects", {}).get("probability", {})
    named = len(rob.get("faulty", {})) + len(rob.get("gross_errors", {})) + \
        sum(p >= NAME_PROBABILITY for p in sus.values())
    out = {}
    for where, q in (("interior", inner), ("gap", None if interior_only else gap)):
        if q is None:
            q = d.from_polar(1.0, rng.uniform(0, 2 * np.pi, 12))  # the whole rim is a gap
        s = est.at(q, LEVEL)
        x = f(q)
        out[where] = (np.mean((s.lower <= x) & (x <= s.upper)),
                      np.mean(interval_score(s.lower, s.upper, x)))
    # Interior RMSE, and that of the posterior mean that knows the prior (s = 2, tau = 1,
    # noise given): the Bayes-optimal estimate for the prior family.
    oracle = run_stage(pb, "gaussian", s=2.0, fix_s=True, tau=1.0)
    x = f(inner)
    out["rmse"] = (np.sqrt(np.mean((est.values(inner) - x) ** 2)),
                   np.sqrt(np.mean((oracle.values(inner) - x) ** 2)))
    return out, named


def main(n_trials=20):
    """Print the table of coverage and interval score per family."""
    d = make_domain(1.0)
    cases = [(k, None, False) for k in FAMILIES] + [(k, "faulty", False) for k in FAMILIES]
    cases += [("prior", None, True), ("prior", "sentinel", False)]
    print(f"{METHOD} fit, {LEVEL:.0%} intervals, {n_trials} seeded trials per family "
          f"(binomial sd of a coverage of 0.9 over 12 x {n_trials} points: about "
          f"{np.sqrt(0.09 / (12 * n_trials)):.3f}, more with correlated points)")
    print(f"{'family':28s} {'cov interior':>12s} {'cov gap':>8s} {'IS interior':>12s} "
          f"{'IS gap':>8s} {'named':>6s} {'excluded/fit':>12s}")
    pooled, rmse = [], (np.nan, np.nan)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for i, (kind, fault, inner_only) in enumerate(cases):
            rng = np.random.default_rng(1000 + i)
            res = [trial(rng, d, kind, fault, inner_only) for _ in range(n_trials)]
            ci = np.mean([r[0]["interior"][0] for r in res])
            cg = np.mean([r[0]["gap"][0] for r in res])
            si = np.mean([r[0]["interior"][1] for r in res])
            sg = np.mean([r[0]["gap"][1] for r in res])
            named = sum(r[1] > 0 for r in res)
            n_out = np.mean([r[1] for r in res])
            label = kind + (f" + {fault} rim sensor" if fault == "faulty" else
                            " + one -9999 sentinel" if fault == "sentinel" else "") + \
                (" (interior probes only)" if inner_only else "")
            print(f"{label:28s} {ci:12.3f} {cg:8.3f} {si:12.4f} {sg:8.4f} "
                  f"{named:3d}/{n_trials} {n_out:6.2f}")
            pooled.append((si, sg, fault == "sentinel"))
            if kind == "prior" and fault is None and not inner_only:
                r = np.array([x[0]["rmse"] for x in res])
                rmse = np.sqrt(np.mean(r**2, axis=0))
    no_sentinel = [p for p in pooled if not p[2]]
    print(f"pooled interval score (mean over families) interior {np.mean([p[0] for p in pooled]):.4g}"
          f", gap {np.mean([p[1] for p in pooled]):.4g}; without the sentinel family interior "
          f"{np.mean([p[0] for p in no_sentinel]):.4g}, gap {np.mean([p[1] for p in no_sentinel]):.4g}")
    print(f"prior family interior RMSE {rmse[0]:.4g} vs {rmse[1]:.4g} for the posterior that "
          f"knows s, tau and the noise: ratio {rmse[0] / rmse[1]:.3f}")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if not a.startswith("--") and a != METHOD]
    main(int(args[0]) if args else 20)

