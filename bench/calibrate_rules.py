"""Seeded calibration of the Tikhonov parameter-choice rules.

Truth is drawn from the smoothness prior (s = 2, tau = 1, mean level 20); readings come from a
rim ring with a contiguous gap and random drop-outs plus a few interior probes, with Gaussian
noise. For each rule we report the share of 90 % intervals that cover the truth at interior
points and at rim points inside the gap, and the RMS error there. Run:

    python bench/calibrate_rules.py [n_trials]

The rule with coverage closest to 90 % at the smallest error is the default of Tikhonov.
"""

import sys
import warnings

import numpy as np

from invert import Disk, LinearProblem, SmoothnessPrior, Tikhonov
from invert.prior import truncation_degree


def scenario(rng, sigma_known, n_rim):
    d = Disk(1.0, (0, 0), truncation_degree(Disk(1.0, (0, 0), 0), 2.0))
    prior = SmoothnessPrior(s=2.0, tau=1.0)
    v = prior.variances(d.eigenvalues, d.degrees)
    v[0] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    c[0] += 20.0
    th = np.linspace(0, 2 * np.pi, n_rim, endpoint=False)
    g0 = rng.uniform(0, 2 * np.pi)
    in_gap = np.mod(th - g0, 2 * np.pi) < 2 * np.pi * 0.2
    drop = rng.random(n_rim) < 0.1
    keep = ~in_gap & ~drop
    rim = np.c_[np.cos(th), np.sin(th)][keep]
    probes = d.from_polar(rng.uniform(0.2, 0.7, 3), rng.uniform(0, 2 * np.pi, 3))
    pts = np.vstack([rim, probes])
    sigma = rng.choice([0.02, 0.05, 0.1])
    y = d.design(pts) @ c + sigma * rng.standard_normal(len(pts))
    sig = np.full(len(pts), sigma) if sigma_known else None
    prob = LinearProblem(d.design(pts), y, sig, d.degrees, d.eigenvalues, d)
    gap_th = g0 + 2 * np.pi * 0.2 * rng.random(4)
    test = np.vstack([d.from_polar(rng.uniform(0, 0.9, 6), rng.uniform(0, 2 * np.pi, 6)),
                      d.from_polar(1.0, gap_th)])
    return prob, test, d.design(test) @ c


def main(n_trials=200):
    rules_known = ["evidence", "gcv", "loo", "lcurve", "discrepancy", "upre"]
    rules_unknown = ["evidence", "gcv", "loo", "lcurve"]
    for known, rules in ((True, rules_known), (False, rules_unknown)):
        print(f"\nsigma {'given' if known else 'estimated'}; {n_trials} trials, 10 test points each")
        print(f"{'rule':<12} {'coverage':>9} {'rmse':>8} {'mean sd':>8}")
        for rule in rules:
            cover, err, sds = [], [], []
            rng = np.random.default_rng(12345)
            for t in range(n_trials):
                prob, test, truth = scenario(rng, known, n_rim=int(rng.integers(13, 40)))
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    est = Tikhonov(rule).fit(prob)
                s = est.at(test, 0.9)
                cover.append((s.lower <= truth) & (truth <= s.upper))
                err.append(s.mean - truth)
                sds.append(s.sd)
            cover = np.concatenate(cover)
            print(f"{rule:<12} {cover.mean():9.3f} {np.sqrt(np.mean(np.concatenate(err) ** 2)):8.4f}"
                  f" {np.mean(np.concatenate(sds)):8.4f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 200)
