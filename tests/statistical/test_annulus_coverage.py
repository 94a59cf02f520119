"""Calibration on the annulus: prior draws and an out-of-prior truth, outer-only and both rims.

Truths (synthetic, seeded):
- ``prior``: the two rim functions drawn independently from the smoothness prior (s = 2,
  tau = 1) about mean levels 60 (outer) and 180 (inner), as the model assumes;
- ``source``: steady radial conduction 60 + 120 ln(b/r)/ln(b/a) plus the field of a line source
  outside the pipe, q ln|x - x0| with |x0| in [1.15 b, 2 b] (harmonic in the wall, but not a
  draw from the prior: its rim functions' Fourier coefficients fall like (b/|x0|)^n / n).

Sensing: ``both`` rims (16-32 outer and 8-16 inner sensors with a random gap and 10 % random
failures, 3 drilled probes) or ``outer`` only (the same outer ring and the 3 probes, nothing on
the bore: the bore level is then carried by the probes through the profile ln(b/r)/ln(b/a); with
no probe either it is not identified at all under independent rim priors, so that case is not
a calibration case).

Each trial is one problem and one test point drawn uniformly in the wall's area, so trials are
independent Bernoulli draws: with n = 600 the hit rate of calibrated 90 % intervals has binomial
sd sqrt(0.9 * 0.1 / 600) = 0.0122, and the check on prior draws is 0.9 +- 3 sd = [0.863, 0.937]
(inside the 85-95 % band). On the out-of-prior truth the requirement is the 85-95 % band
itself: the default stage's held-out check (invert.stages.cv_scale) widens the intervals when
the held-out readings show the misfit, so some over-coverage is by design. The stage is the
default one (``averaged``: the Gaussian posterior averaged over the smoothness order and the
prior scale with evidence weights).

Measured (this file's seeds, default stage with the held-out check; before that check in
parentheses): both rims, prior 0.918 (0.917), source 0.942 (0.935); outer only, prior 0.875
(0.860), source 0.978 (0.973). With the outer rim alone, the interval at a wall point is mostly
the inner rim function's prior at the scale fitted to the outer rim: too wide when the truth's
inner rim function is much smoother than its outer one (the outside source), so that case is an
expected failure (``xfail``, strict: a fix shows as XPASS); coupling the two rims' priors (a
fitted correlation) is the step that would address it.
"""

import warnings

import numpy as np
import pytest
from scenarios import noisy_problem, outside_gap, ring_angles

from invert.geometry import Annulus
from invert.prior import SmoothnessPrior
from invert.stages.averaged import AveragedPosterior

N_TRIALS = 600
#: 3 binomial sd of the hit rate of n independent trials at 90 %.
BAND = 3 * np.sqrt(0.9 * 0.1 / N_TRIALS)


def _prior_truth(rng, d):
    v = SmoothnessPrior(s=2.0, tau=1.0).variances(d.eigenvalues, d.degrees)
    v[d.mean_columns] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    c[d.mean_columns] += (60.0, 180.0)
    return lambda pts: d.design(pts) @ c


def _source_truth(rng, d):
    x0 = d.from_polar(rng.uniform(1.15, 2.0), rng.uniform(0, 2 * np.pi))[0]
    q = rng.choice([-1, 1]) * rng.uniform(2.0, 10.0)

    def u(pts):
        r = d.relative_radius(pts)
        radial = 60.0 + 120.0 * np.log(1 / r) / np.log(1 / d.alpha)
        return radial + q * np.log(np.hypot(*(pts - x0).T))

    return u


def _sensors(rng, d, both):
    rings = [(1.0, int(rng.integers(16, 33)))]
    if both:
        rings.append((d.alpha, int(rng.integers(8, 17))))
    pts = []
    for rho, n in rings:
        th = ring_angles(n, offset=rng.uniform(0, 2 * np.pi))
        keep = outside_gap(th, rng.uniform(0, 2 * np.pi), 0.15) & (rng.random(n) >= 0.1)
        pts.append(d.from_polar(rho, th[keep]))
    wall = d.alpha + (1 - d.alpha) * rng.uniform(0.2, 0.8, 3)
    pts.append(d.from_polar(wall, rng.uniform(0, 2 * np.pi, 3)))
    return np.vstack(pts)


def _coverage(truth_maker, both, seed):
    d = Annulus(1.0, 0.6, n_modes=24)
    rng = np.random.default_rng(seed)
    hits = []
    for _ in range(N_TRIALS):
        truth = truth_maker(rng, d)
        pts = _sensors(rng, d, both)
        sigma = rng.choice([0.02, 0.05, 0.1])
        G = d.design(pts)
        prob = noisy_problem(rng, d, pts, np.zeros(d.n_coef), sigma)
        prob = type(prob)(G, prob.y + truth(pts), prob.sigma, d.degrees, d.eigenvalues, d,
                          points=pts)
        # uniform in the wall's area: r^2 uniform on [a^2, b^2]
        rho = np.sqrt(rng.uniform(d.alpha**2, 1.0))
        test = d.from_polar(np.array([rho]), np.array([rng.uniform(0, 2 * np.pi)]))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            s = AveragedPosterior().fit(prob).at(test, 0.9)
        t = truth(test)
        hits.append(bool((s.lower[0] <= t[0]) & (t[0] <= s.upper[0])))
    return float(np.mean(hits))


OUTER_ONLY = pytest.mark.xfail(strict=True, reason="outer rim only: the wall interval is the "
                               "inner rim function's prior at the outer rim's fitted scale "
                               "(see the module notes); rim coupling is not built")


@pytest.mark.slow
@pytest.mark.parametrize("truth, both", [
    ("prior", True), ("prior", False), ("source", True),
    pytest.param("source", False, marks=OUTER_ONLY)],
    ids=["both-rims-prior", "outer-only-prior", "both-rims-source", "outer-only-source"])
def test_wall_intervals_cover_90_percent(truth, both):
    maker = {"prior": _prior_truth, "source": _source_truth}[truth]
    cover = _coverage(maker, both, seed=77 + 10 * both)
    if truth == "prior":
        assert abs(cover - 0.9) <= BAND, cover
    else:
        assert 0.85 <= cover <= 0.95, cover
