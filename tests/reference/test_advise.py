"""Sensor advice: rank-one algebra, the disk-average weights, greedy vs brute force, gaps, CLI.

Sources: rank-one (Sherman–Morrison) update of the posterior covariance and the goal-oriented
A-optimal gain (Joshi & Boyd 2009; Alexanderian 2021); disk integrals by
scipy.integrate.
"""

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from invert import Disk, LinearProblem, Readings
from invert.diagnostics.advise import (
    advise,
    disk_mean_variance_weights,
    greedy_design,
    rank_one_update,
    target_matrix,
    variance_gain,
)
from invert.diagnostics.diagnose import unsensed_arcs
from invert.stages import Tikhonov


def _problem(M=16, N=6, gaps=(), sigma=0.2, rng=0, probes=None):
    rng = np.random.default_rng(rng)
    d = Disk(1.0, (0.0, 0.0), N)
    pts = d.from_polar(1.0, 2 * np.pi * np.arange(M) / M)
    if probes is not None:
        pts = np.vstack([pts, probes])
    v = np.cos(np.arctan2(pts[:, 1], pts[:, 0])) + 0.3 * rng.normal(size=len(pts))
    v[list(gaps)] = np.nan
    r = Readings(pts, v, np.full(len(pts), sigma), np.array([f"s{i}" for i in range(len(pts))]))
    pb = LinearProblem.from_readings(r, d)
    return pb, Tikhonov("evidence").fit(pb)


def _posterior_with(cov, rows, noise_var):
    # Recomputed posterior after adding readings: (Gamma^-1 + sum g g^T / s^2)^-1.
    P = np.linalg.inv(cov)
    for g in np.atleast_2d(rows):
        P = P + np.outer(g, g) / noise_var
    return np.linalg.inv(P)


def test_rank_one_update_equals_recomputed_posterior(rng):
    # Sherman–Morrison vs explicit inversion. rtol 1e-9: algebra on a covariance with condition
    # number ~1e5 here.
    pb, est = _problem(N=4)
    g = pb.domain.design(pb.domain.from_polar(0.6, 1.1))[0]
    new = rank_one_update(est.cov, g, 0.04)
    assert new == pytest.approx(_posterior_with(est.cov, g, 0.04), rel=1e-9, abs=1e-12)
    # and the gain is the drop of the target trace(H Gamma H^T).
    H = target_matrix(pb.domain)
    drop = np.trace(H @ est.cov @ H.T) - np.trace(H @ new @ H.T)
    assert variance_gain(est.cov, H, g, 0.04)[0] == pytest.approx(drop, rel=1e-9)


@pytest.mark.parametrize("n", [0, 1, 3])
def test_disk_average_weights_by_quadrature(n):
    # (1/pi) int_0^1 int_0^2pi (rho^n cos n th)^2 rho dth drho = 1/(2n+2) for n >= 1, 1 for n = 0;
    # scipy.integrate.dblquad as the oracle (accuracy 1e-10).
    q, _ = integrate.dblquad(lambda th, r: (r**n * np.cos(n * th)) ** 2 * r / np.pi,
                             0, 1, 0, 2 * np.pi, epsabs=1e-12)
    assert disk_mean_variance_weights([n])[0] == pytest.approx(q, rel=1e-9)


def test_target_is_mean_posterior_variance_over_the_disk():
    # trace(Gamma M) equals the area average of the pointwise posterior variance, here by a
    # polar product rule: Gauss–Legendre in r (exact for the polynomial in r) and uniform
    # angles (exact for trigonometric polynomials of degree < n_angles/2). rtol 1e-9.
    pb, est = _problem(N=5)
    d = pb.domain
    H = target_matrix(d)
    x, w = np.polynomial.legendre.leggauss(12)
    r, wr = (x + 1) / 2, w / 2
    th = 2 * np.pi * np.arange(32) / 32
    Rg, Tg = np.meshgrid(r, th, indexing="ij")
    var = est.at(d.from_polar(Rg.ravel(), Tg.ravel())).sd.reshape(Rg.shape) ** 2
    avg = 2 * np.sum(wr[:, None] * r[:, None] * var) / 32  # (1/pi) * int r dr dth
    assert np.trace(H @ est.cov @ H.T) == pytest.approx(avg, rel=1e-9)


def test_greedy_matches_brute_force():
    # Brute force: for every candidate, recompute the posterior by explicit inversion and the
    # target; the greedy pick (by the closed-form gain) must be the argmin, at each of 3 steps.
    pb, est = _problem(M=10, N=4, gaps=(2, 3, 4))
    d = pb.domain
    cand = d.from_polar(1.0, 2 * np.pi * np.arange(36) / 36)
    rows = d.design(cand)
    H = target_matrix(d)
    nv = 0.04
    picks, gains, _ = greedy_design(est.cov, H, rows, nv, 3)
    cov = est.cov
    for i, gain in zip(picks, gains):
        targets = np.array([np.trace(H @ _posterior_with(cov, g, nv) @ H.T) for g in rows])
        targets[[p for p in picks[:picks.index(i)]]] = np.inf
        assert int(np.argmin(targets)) == i
        assert np.trace(H @ cov @ H.T) - targets[i] == pytest.approx(gain, rel=1e-8)
        cov = _posterior_with(cov, rows[i], nv)
    # Greedy never increases the target (Krause, Singh & Guestrin 2008: a rank-one update never
    # increases the posterior variance).
    assert all(g >= 0 for g in gains)


def test_first_rim_suggestion_lies_in_the_gap():
    pb, est = _problem(M=16, N=6, gaps=(5, 6, 7))
    (a, b), = unsensed_arcs(pb)
    d = pb.domain
    rim, _ = d.rim_grid(360)
    adv = advise(est, pb, count=3, candidates=rim)
    first = np.deg2rad(adv.theta_deg[0])
    assert a <= first <= b
    # The failed sensor to repair first is the middle one of the three.
    assert adv.repair_sensor[0] == "s6"
    # New sensors keep the minimum spacing (default half the sensor spacing, 11.25 deg).
    t = np.sort(adv.theta_deg)
    assert np.all(np.diff(t) >= adv.min_spacing_deg - 1e-9)


def test_query_target_prefers_positions_near_the_query():
    # Goal-oriented target: variance at one interior point; the best single new sensor from
    # a set of interior candidates is the one at the query point itself (it alone observes
    # the quantity directly).
    pb, est = _problem(M=16, N=6, gaps=(5, 6, 7))
    d = pb.domain
    q = d.from_polar(0.5, 2 * np.pi * 6 / 16)
    cand = np.vstack([d.from_polar(0.5, np.deg2rad(np.arange(0, 360, 15))), q])
    adv = advise(est, pb, count=1, candidates=cand, query=q)
    assert adv.points[0] == pytest.approx(q[0])
    assert adv.target == "mean variance at the query points"


def test_advise_cli(tmp_path):
    from invert.cli import main

    pb, _ = _problem(M=16, N=6, gaps=(5, 6, 7))
    rows = ["sensor,x,y,value,sigma"]
    allpts = np.vstack([pb.points, pb.gap_points])
    vals = np.concatenate([pb.y, np.full(len(pb.gap_points), np.nan)])
    for s, p, v in zip(np.concatenate([pb.sensor, pb.gap_sensor]), allpts, vals):
        rows.append(f"{s},{p[0]:.8f},{p[1]:.8f},{'' if np.isnan(v) else f'{v:.6f}'},0.2")
    (tmp_path / "r.csv").write_text("\n".join(rows) + "\n")
    assert main(["advise", str(tmp_path / "r.csv"), "--radius", "1", "--out",
                 str(tmp_path / "adv"), "--count", "4"]) == 0
    cand = pd.read_csv(tmp_path / "adv" / "candidates.csv")
    rep = pd.read_csv(tmp_path / "adv" / "repair.csv")
    assert list(cand.columns[:4]) == ["rank", "x", "y", "theta_deg"]
    assert list(cand["rank"]) == [1, 2, 3, 4]
    assert np.all(np.diff(cand["target_after"]) < 0)
    assert rep["sensor"][0] == "s6" and len(rep) == 3
    # Bad input: exit code 2, nothing written.
    assert main(["advise", str(tmp_path / "r.csv"), "--radius", "1", "--out",
                 str(tmp_path / "bad"), "--count", "0"]) == 2
    assert not (tmp_path / "bad").exists()
