"""The assembly layer sizes the truncation for a stage; stages see only the LinearProblem."""

import warnings

import numpy as np
import pytest

from invert import Ball, Disk, LinearProblem
from invert.errors import FitWarning
from invert.stages import GaussianPosterior, MCMCSampler, Tikhonov
from invert.workflow import fit_stage, problem_for_stage


def _rim_problem(domain, n=20, *, with_points=True):
    th = np.linspace(0, 2 * np.pi, n, endpoint=False)
    pts = domain.from_polar(1.0, th)
    y = 20 + np.cos(th) + 0.3 * np.sin(2 * th)
    return LinearProblem(domain.design(pts), y, np.full(n, 0.05), domain.degrees,
                         domain.eigenvalues, domain, points=pts if with_points else None)


def _omitted_share(N, s, n_max=2_000_000):
    # Direct sum of the disk's prior rim variance beyond degree N (two columns per degree,
    # eigenvalue n^2): an independent count of invert.prior.truncation_degree's tail.
    n = np.arange(1, n_max + 1, dtype=float)
    w = 2 * (1 + n**2) ** (-s)
    return w[N:].sum() / w.sum()


def test_truncation_is_sized_for_the_roughest_smoothness_a_stage_tries():
    prob = _rim_problem(Disk(1.0, (0, 0), 10))
    stage = GaussianPosterior(s_bounds=(1.5, 5.0))
    new = problem_for_stage(prob, stage)
    N = new.domain.n_modes
    # The disk's rule: under 1e-4 of the rim variance left out at s = 1.5, and N the first
    # degree that achieves it (direct sum; 1e-4 is the rule's tolerance).
    assert _omitted_share(N, 1.5) <= 1e-4 < _omitted_share(N - 1, 1.5)
    # The first columns are the old design (algebra, 1e-12) and the note is recorded.
    np.testing.assert_allclose(new.G[:, :prob.n_coef], prob.G, rtol=1e-12, atol=1e-12)
    assert new.assembly_notes and "harmonics raised from 10" in new.assembly_notes[0]
    # Tikhonov uses the truncation it is given; a hand-made design is never replaced.
    assert problem_for_stage(prob, Tikhonov()) is prob
    hand = _rim_problem(Disk(1.0, (0, 0), 10), with_points=False)
    assert problem_for_stage(hand, stage) is hand


def test_stage_given_too_few_harmonics_warns_instead_of_rebuilding():
    prob = _rim_problem(Disk(1.0, (0, 0), 6))
    with pytest.warns(FitWarning, match="truncation degree"):
        est = GaussianPosterior(s=1.6).fit(prob)
    assert est.domain.n_modes == 6
    with warnings.catch_warnings():
        warnings.simplefilter("error", FitWarning)
        est = fit_stage(GaussianPosterior(s=1.6), prob)
    assert est.domain.n_modes > 6 and est.info["notes"]


def test_angle_model_needs_a_domain_that_can_turn_sensors():
    ball = Ball(1.0, (0, 0, 0), 3)
    rng = np.random.default_rng(0)
    pts = rng.standard_normal((20, 3))
    pts /= np.linalg.norm(pts, axis=1)[:, None]
    G = ball.design(pts)
    prob = LinearProblem(G, G[:, 0] * 0 + 1.0 + 0.01 * rng.standard_normal(20),
                         np.full(20, 0.01), ball.degrees, ball.eigenvalues, ball, points=pts)
    with pytest.raises(ValueError, match="cannot turn sensor points"):
        MCMCSampler(angle_sd_deg=2.0, s=3.0, progress=False).fit(prob)
    hand = LinearProblem(G, prob.y, prob.sigma, prob.degrees, prob.eigenvalues, ball)
    with pytest.raises(ValueError, match="sensor points"):
        MCMCSampler(angle_sd_deg=2.0, s=3.0, progress=False).fit(hand)


def test_rotated_design_matches_the_design_at_turned_points():
    # A sensor at angle theta turned by delta reads the design row at theta + delta
    # (polar coordinates computed here with numpy, independently of the domain).
    d = Disk(2.0, (0.5, -1.0), 5)
    rng = np.random.default_rng(1)
    r, th = rng.uniform(0.2, 2.0, 7), rng.uniform(0, 2 * np.pi, 7)
    pts = np.c_[0.5 + r * np.cos(th), -1.0 + r * np.sin(th)]
    prob = LinearProblem(d.design(pts), np.zeros(7), None, d.degrees, d.eigenvalues, d,
                         points=pts)
    delta = rng.normal(0, 0.1, (3, 7))
    got = prob.rotated_design(delta)
    for b in range(3):
        turned = np.c_[0.5 + r * np.cos(th + delta[b]), -1.0 + r * np.sin(th + delta[b])]
        # 1e-12: the same polynomial evaluated at points rounded differently.
        np.testing.assert_allclose(got[b], d.design(turned), rtol=1e-12, atol=1e-12)
