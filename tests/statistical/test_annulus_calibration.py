"""Calibration on the annulus: seeded truths drawn from the prior, readings on both rims.

The truth's two rim functions are independent draws from the smoothness prior (s = 2, tau = 1)
about mean levels 60 (outer) and 180 (inner); readings on both rims with random gaps, a few
in the wall, noise sd from {0.02, 0.05, 0.1}. The default Tikhonov rule (evidence) and the
Gaussian stage must give 90 % intervals that cover 85-95 % of the true values at points in the
wall and on both rims (the issue's band; the points of one problem are correlated, so a binomial
band for independent points would be too narrow).
"""

import warnings

import numpy as np
import pytest
from scenarios import noisy_problem, outside_gap, ring_angles

from invert import Tikhonov
from invert.geometry import Annulus
from invert.prior import SmoothnessPrior
from invert.stages.gaussian import GaussianPosterior


def draw_truth(rng, d, s=2.0):
    v = SmoothnessPrior(s=s, tau=1.0).variances(d.eigenvalues, d.degrees)
    v[d.mean_columns] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    c[d.mean_columns] += (60.0, 180.0)
    return c


def scenario(rng, d):
    pts = []
    for rho, n in ((1.0, int(rng.integers(16, 33))), (d.alpha, int(rng.integers(8, 17)))):
        th = ring_angles(n, offset=rng.uniform(0, 2 * np.pi))
        keep = outside_gap(th, rng.uniform(0, 2 * np.pi), 0.15) & (rng.random(n) >= 0.1)
        pts.append(d.from_polar(rho, th[keep]))
    wall = d.alpha + (1 - d.alpha) * rng.uniform(0.2, 0.8, 3)
    pts.append(d.from_polar(wall, rng.uniform(0, 2 * np.pi, 3)))
    pts = np.vstack(pts)
    c = draw_truth(rng, d)
    prob = noisy_problem(rng, d, pts, c, rng.choice([0.02, 0.05, 0.1]))
    rho = np.r_[d.alpha + (1 - d.alpha) * rng.uniform(0.05, 0.95, 6), 1.0, 1.0, d.alpha,
                d.alpha]
    test = d.from_polar(rho, rng.uniform(0, 2 * np.pi, rho.size))
    return prob, test, d.design(test) @ c


@pytest.mark.slow
@pytest.mark.parametrize("stage", [Tikhonov, GaussianPosterior])
def test_intervals_cover_90_percent_with_both_rims_sensed(stage):
    d = Annulus(1.0, 0.6, n_modes=24)
    rng = np.random.default_rng(1313)
    hits = []
    for _ in range(120):
        prob, test, truth = scenario(rng, d)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            s = stage().fit(prob).at(test, 0.9)
        hits.append((s.lower <= truth) & (truth <= s.upper))
    cover = np.mean(hits)
    assert 0.85 <= cover <= 0.95, cover
