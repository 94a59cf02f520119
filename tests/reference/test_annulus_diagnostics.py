"""Per-rim diagnostics on an annulus: unsensed arcs, harmonic measure, depth from each rim.

Outside references: the harmonic measure of a whole rim is the steady radial-conduction profile
ln(r/a)/ln(b/a) (Bergman, Lavine, Incropera & DeWitt, Fundamentals of Heat and Mass Transfer,
7th ed., section 3.3.1); of one arc, a second-order finite-difference solution of Laplace's
equation (scipy.sparse); the resolved degree against the precision rule computed by hand from
the closed-form radial profiles sinh(n ln(r/a))/sinh(n ln(b/a)) (Strauss, PDE, section 6.4).
"""

import json

import numpy as np
import pandas as pd
import pytest
from scenarios import annulus_laplace_fd

from invert import LinearProblem, Readings
from invert.cli import main
from invert.diagnostics.depth import prior_variances
from invert.diagnostics.diagnose import diagnose
from invert.diagnostics.rims import rim_arc_measure, rim_resolved_degree, rim_unsensed_arcs
from invert.geometry import Annulus
from invert.stages import GaussianPosterior

A, B = 0.5, 1.0


def _problem(gaps=(), n_outer=24, n_inner=12, sigma=0.1, rng=0):
    rng = np.random.default_rng(rng)
    d = Annulus(B, A, n_modes=6)
    pts = np.vstack([d.from_polar(1.0, 2 * np.pi * np.arange(n_outer) / n_outer),
                     d.from_polar(A / B, 2 * np.pi * np.arange(n_inner) / n_inner)])
    c = np.zeros(d.n_coef)
    c[:3] = 60.0, 180.0, 4.0
    v = d.field(c, pts) + sigma * rng.standard_normal(len(pts))
    v[list(gaps)] = np.nan
    r = Readings(pts, v, np.full(len(pts), sigma), np.array([f"s{i}" for i in range(len(pts))]))
    return LinearProblem.from_readings(r, d)


def test_unsensed_arcs_are_found_rim_by_rim():
    # outer sensors 3,4,5 (45..75 deg at 15 deg spacing) and inner 24+6 (180 deg, 30 deg
    # spacing) failed: arcs from half a spacing past the last working sensor (counting)
    pb = _problem(gaps=(3, 4, 5, 30))
    outer, inner = (np.rad2deg(rim_unsensed_arcs(pb, k)) for k in (0, 1))
    np.testing.assert_allclose(outer, [[37.5, 82.5]], atol=1e-9)
    np.testing.assert_allclose(inner, [[165.0, 195.0]], atol=1e-9)
    # a rim with no working sensor is unsensed as a whole
    pb = _problem(gaps=range(24, 36))
    np.testing.assert_allclose(np.rad2deg(rim_unsensed_arcs(pb, 1)), [[0.0, 360.0]])


def test_harmonic_measure_of_a_whole_rim_is_the_radial_conduction_profile():
    # omega_outer(r) = ln(r/a)/ln(b/a), omega_inner = 1 - omega_outer; the Fourier sum is exact
    # for a constant indicator (rounding), the clip to [0, 1] does not bite inside the wall.
    d = Annulus(B, A, n_modes=4)
    rho = np.array([0.55, 0.7, 0.9])
    pts = d.from_polar(rho, [0.3, 2.0, 4.0])
    full = [[0.0, 2 * np.pi]]
    expect = np.log(rho / (A / B)) / np.log(B / A)
    assert rim_arc_measure(d, 0, pts, full) == pytest.approx(expect, abs=1e-12)
    assert rim_arc_measure(d, 1, pts, full) == pytest.approx(1 - expect, abs=1e-12)


def test_harmonic_measure_of_an_arc_equals_a_finite_difference_solve():
    # Indicator of the outer arc 60..150 deg as the outer rim function, zero on the inner rim;
    # finite differences (second order away from the indicator's jumps) on two grids: the
    # series value at mid-wall points agrees with the finer grid within the coarse-fine
    # difference (a bound on the finer grid's error for a converging second-order scheme).
    d = Annulus(B, A, n_modes=4)
    lo, hi = np.deg2rad(60.0), np.deg2rad(150.0)

    def fo(t):
        return float(lo <= t % (2 * np.pi) <= hi)

    sols = [annulus_laplace_fd(A, B, fo, lambda t: 0.0, n_r, n_t)
            for n_r, n_t in ((41, 144), (81, 288))]
    r, t, U = sols[1]
    i = np.argmin(np.abs(r - 0.75))
    j = np.array([40, 84, 150, 240])  # 50, 105, 187.5, 300 degrees
    pts = d.from_polar(np.full(j.size, r[i] / B), t[j])
    got = rim_arc_measure(d, 0, pts, [[lo, hi]])
    coarse = sols[0][2][np.argmin(np.abs(sols[0][0] - 0.75)), j // 2]
    assert np.abs(got - U[i, j]).max() <= np.abs(coarse - U[i, j]).max() + 1e-4
    assert got[1] > 0.3 and got[3] < 0.05  # below the arc it dominates, opposite it does not


def test_resolved_degree_follows_the_precision_rule():
    # Largest n with A(rho, n)^2 v_n M / (2 sigma^2) >= 1, A the closed-form profile, computed
    # here from sinh directly (exact for these moderate n; rounding).
    pb = _problem()
    est = GaussianPosterior(2.0).fit(pb)
    d = est.domain
    L = np.log(B / A)
    v = prior_variances(est)
    deg = np.asarray(d.degrees)
    for k, rho in ((0, 0.9), (1, 0.6)):
        s = np.log(rho / (A / B)) if k == 0 else np.log(B / (rho * B))
        mask = d.rim_circles.rim_columns(k)
        best = 0
        for n in range(1, d.n_modes + 1):
            vn = v[mask & (deg == n)][0]
            att = np.sinh(n * s) / np.sinh(n * L)
            if att**2 * vn * pb.n_readings / (2 * est.noise_sd**2) < 1:
                break
            best = n
        assert rim_resolved_degree(est, k, [rho], n_readings=pb.n_readings)[0] == best


def test_diagnose_reports_gaps_and_depth_rim_by_rim():
    pb = _problem(gaps=(3, 4, 5, 30))
    est = GaussianPosterior(2.0).fit(pb)
    out = diagnose(est, pb).to_dict()
    gaps, depth = out["gaps"]["by_rim"], out["depth"]["by_rim"]
    assert set(gaps) == set(depth) == {"outer", "inner"}
    np.testing.assert_allclose(gaps["outer"]["unsensed_arcs_deg"], [[37.5, 82.5]], atol=1e-9)
    # depth 0 is on the rim: the rim's own sensors resolve more there than across the wall
    for rim in ("outer", "inner"):
        r = depth[rim]["resolved_degree_at_depth_fraction"]
        assert r["0.00"] >= r["0.50"] >= r["1.00"] == 0
    # mid-wall at 180 deg lies opposite both gaps' rims' arcs only partly: shares in [0, 1)
    for rim in ("outer", "inner"):
        assert all(0 <= s < 1 for s in gaps[rim]["share_at_points"].values())


def test_fit_summary_and_report_carry_the_per_rim_diagnostics(tmp_path):
    pb = _problem(gaps=(3, 4, 5, 30))
    pts = np.vstack([pb.points, pb.gap_points])
    df = pd.DataFrame({"sensor": list(pb.sensor) + list(pb.gap_sensor), "x": pts[:, 0],
                       "y": pts[:, 1], "value": np.r_[pb.y, [np.nan] * 4], "sigma": 0.1})
    df.to_csv(tmp_path / "w.csv", index=False)
    out = tmp_path / "o"
    assert main(["fit", str(tmp_path / "w.csv"), "--domain", "annulus", "--radius", "1",
                 "--inner-radius", "0.5", "--out", str(out)]) == 0
    s = json.loads((out / "summary.json").read_text())
    np.testing.assert_allclose(s["diagnostics"]["gaps"]["by_rim"]["inner"]["unsensed_arcs_deg"],
                               [[165.0, 195.0]], atol=1e-9)
    html = (out / "report.html").read_text()
    assert "Unsensed arcs of the outer rim" in html and "Depth of information from each rim" \
        in html
    assert (out / "rim_depth.png").exists()
