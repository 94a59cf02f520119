"""Calibration and behaviour of intervals in seeded simulation with truth from the prior."""

import warnings

import numpy as np
import pytest
from scenarios import noisy_problem, outside_gap, prior_coefficients, ring_angles

from invert import Disk, LinearProblem, Tikhonov, make_domain


def draw_truth(rng, d, s=2.0):
    return prior_coefficients(rng, d, s=s)


def scenario(rng, d, known):
    n_rim = int(rng.integers(13, 41))
    th = ring_angles(n_rim)
    g0 = rng.uniform(0, 2 * np.pi)
    keep = outside_gap(th, g0, 0.2) & (rng.random(n_rim) >= 0.1)
    pts = np.vstack([d.from_polar(1.0, th[keep]),
                     d.from_polar(rng.uniform(0.2, 0.7, 3), rng.uniform(0, 2 * np.pi, 3))])
    sigma = rng.choice([0.02, 0.05, 0.1])
    c = draw_truth(rng, d)
    prob = noisy_problem(rng, d, pts, c, sigma, known=known)
    test = np.vstack([d.from_polar(rng.uniform(0, 0.9, 6), rng.uniform(0, 2 * np.pi, 6)),
                      d.from_polar(1.0, g0 + 0.4 * np.pi * rng.random(4))])  # interior + gap
    return prob, test, d.design(test) @ c


@pytest.mark.slow
@pytest.mark.parametrize("known", [True, False])
def test_default_rule_intervals_cover_90_percent(known):
    # 250 problems x 10 points. The points of one problem are correlated, so the binomial band
    # (+-1.9 % for 2500 independent points) is too narrow; the 85-95 % band is used.
    d = make_domain(1.0, s=2.0)
    rng = np.random.default_rng(2026)
    hits = []
    for _ in range(250):
        prob, test, truth = scenario(rng, d, known)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            s = Tikhonov().fit(prob).at(test, 0.9)
        hits.append((s.lower <= truth) & (truth <= s.upper))
    cover = np.mean(hits)
    assert 0.85 <= cover <= 0.95, cover


def test_interval_widens_toward_middle_of_gap_and_probe_narrows(rng):
    # Inside a rim gap the posterior sd grows toward the gap's middle (the nearest data are
    # farthest there); an interior probe near the gap reduces it (common-sense properties of
    # any Gaussian posterior with a stationary prior; checked here, not assumed).
    d = Disk(1.0, (0, 0), 24)
    th = np.linspace(0, 2 * np.pi, 32, endpoint=False)
    keep = (th < np.deg2rad(120)) | (th > np.deg2rad(200))
    pts = d.from_polar(1.0, th[keep])
    c = draw_truth(rng, d)
    y = d.design(pts) @ c + 0.05 * rng.standard_normal(len(pts))
    prob = LinearProblem(d.design(pts), y, np.full(len(y), 0.05), d.degrees, d.eigenvalues, d)
    est = Tikhonov("fixed", lam=0.05**2).fit(prob)  # tau = 1, the truth's prior
    # The gap runs from the sensor at 112.5 deg to the one at 202.5 deg: its middle is 157.5
    # deg (points beyond it mirror points before it, with equal sd).
    gap = np.deg2rad(np.linspace(125, 157.5, 8))
    sd = est.at(d.from_polar(1.0, gap)).sd
    assert np.all(np.diff(sd) > 0)
    probe = d.from_polar(0.7, np.deg2rad(160))
    pts2 = np.vstack([pts, probe])
    y2 = d.design(pts2) @ c + 0.05 * rng.standard_normal(len(pts2))
    prob2 = LinearProblem(d.design(pts2), y2, np.full(len(y2), 0.05), d.degrees, d.eigenvalues, d)
    est2 = Tikhonov("fixed", lam=0.05**2).fit(prob2)
    mid = d.from_polar([1.0, 0.8], np.deg2rad([160, 160]))
    assert np.all(est2.at(mid).sd < est.at(mid).sd)


def test_doubling_truncation_changes_nothing_that_matters(rng):
    # The truncation degree is chosen so the omitted prior variance on the rim is < 1e-4 of
    # the total (invert.prior.truncation_degree). Doubling it moves means and sds at interior
    # and rim points by < 2 % of the posterior sd.
    d1 = make_domain(1.0, s=2.0)
    d2 = d1.with_modes(2 * d1.n_modes)
    th = np.linspace(0, 2 * np.pi, 24, endpoint=False)[3:]
    pts = np.vstack([d1.from_polar(1.0, th), d1.from_polar([0.5, 0.3], [0.4, 2.0])])
    c = draw_truth(rng, d2)
    y = d2.design(pts) @ c + 0.05 * rng.standard_normal(len(pts))
    q = d1.from_polar([0.0, 0.6, 0.9, 1.0, 1.0], [0, 1.0, 2.0, 0.2, 0.5])
    out = []
    for d in (d1, d2):
        prob = LinearProblem(d.design(pts), y, np.full(len(y), 0.05), d.degrees, d.eigenvalues, d)
        out.append(Tikhonov().fit(prob).at(q))
    assert np.max(np.abs(out[0].mean - out[1].mean) / out[1].sd) < 0.02
    assert np.max(np.abs(out[0].sd / out[1].sd - 1)) < 0.02
