"""Sensor advice on an annulus: candidates on both rims and in the wall, the wall-mean target.

Outside references: the wall mean of the squared columns against scipy.integrate.dblquad; the
advice gain against the posterior recomputed by explicit inversion (Sherman–Morrison is exact
for a rank-one update) and against the wall-mean variance taken by scipy quadrature of
``Estimate.at``.
"""

import json

import numpy as np
import pandas as pd
import pytest
from scipy import integrate

from invert import LinearProblem, Readings
from invert.cli import main
from invert.diagnostics.advise import advise, default_candidates, target_matrix
from invert.geometry import Annulus
from invert.stages import Tikhonov

A, B = 0.05, 0.08


def _problem(n_outer=24, n_inner=8, gaps=(), sigma=0.1, rng=0, alpha=A / B):
    rng = np.random.default_rng(rng)
    d = Annulus(1.0, alpha, n_modes=6)
    pts = np.vstack([d.from_polar(1.0, 2 * np.pi * np.arange(n_outer) / n_outer),
                     d.from_polar(alpha, 2 * np.pi * (np.arange(n_inner) + 0.5) / n_inner)])
    c = np.zeros(d.n_coef)
    c[:3] = 60.0, 180.0, 4.0
    v = d.field(c, pts) + sigma * rng.standard_normal(len(pts))
    v[list(gaps)] = np.nan
    r = Readings(pts, v, np.full(len(pts), sigma), np.array([f"s{i}" for i in range(len(pts))]))
    pb = LinearProblem.from_readings(r, d)
    return pb, Tikhonov("evidence").fit(pb)


@pytest.mark.parametrize("alpha", [0.1, 0.9])
def test_wall_mean_square_equals_scipy_quadrature(alpha):
    # (1/area) * integral of h_i h_j over the wall by scipy's dblquad (epsabs 1e-11); the
    # Gauss–Legendre rule integrates these smooth profiles to rounding, so rtol 1e-8 leaves room
    # only for dblquad's own error.
    d = Annulus(1.0, alpha, n_modes=3)
    M = d.region_mean_square()
    area = np.pi * (1 - alpha**2)

    def col(j, r, th):
        return d.design(d.from_polar(np.array([r]), np.array([th])))[0, j]

    for i, j in [(0, 0), (0, 1), (1, 1), (2, 4), (3, 5), (12, 12), (10, 12), (2, 3), (2, 6)]:
        v = integrate.dblquad(lambda th, r: col(i, r, th) * col(j, r, th) * r, alpha, 1.0,
                              0.0, 2 * np.pi, epsabs=1e-11)[0] / area
        assert M[i, j] == pytest.approx(v, rel=1e-8, abs=1e-11), (i, j)
    assert np.allclose(M, M.T)


def test_default_candidates_cover_both_rims_and_the_wall():
    d = Annulus(B, A, n_modes=4)
    cand = default_candidates(d, n_rim=36)
    names = d.rim_circles.position_names(cand)
    # 36 angles on each rim, 36 angles on 3 rings of the wall (counting, no tolerance)
    assert [int(np.sum(names == k)) for k in ("outer", "inner", "wall")] == [36, 36, 108]
    rho = d.relative_radius(cand)
    assert rho.min() == pytest.approx(A / B, rel=1e-12) and rho.max() == pytest.approx(1.0)
    # wall rings 1/4, 1/2, 3/4 of the way from the bore to the outer rim
    wall = np.unique(np.round(rho[names == "wall"], 12))
    assert wall == pytest.approx(A / B + np.array([0.25, 0.5, 0.75]) * (1 - A / B), rel=1e-12)


def test_advice_gain_is_the_drop_of_the_wall_mean_variance():
    pb, est = _problem(gaps=(3, 27))
    adv = advise(est, pb, count=2)
    assert adv.target == "mean variance over the wall"
    d = pb.domain
    # The target tr(H Gamma H^T) equals the area mean of the posterior variance over the wall,
    # integrated by scipy (dblquad of Estimate.at's variance; epsabs 1e-10 -> rel 1e-6).
    area = np.pi * (1 - d.alpha**2)

    def var(th, r):
        return est.at(d.from_polar(np.array([r]), np.array([th]))).sd[0] ** 2 * r

    ref = integrate.dblquad(var, d.alpha, 1.0, 0.0, 2 * np.pi, epsabs=1e-10)[0] / area
    assert adv.target_before == pytest.approx(ref, rel=1e-6)
    # The first pick's reduction equals the drop recomputed by explicit inversion of the
    # posterior precision plus the new reading's g g^T / sigma^2 (algebra; rtol 1e-8).
    g = d.design(adv.points[:1])[0]
    P = np.linalg.inv(est.cov) + np.outer(g, g) / adv.noise_sd**2
    H = target_matrix(d)
    after = np.trace(H @ np.linalg.inv(P) @ H.T)
    assert adv.reduction[0] == pytest.approx(adv.target_before - after, rel=1e-8)
    # the repair list names the two failed sensors, one on each rim
    assert sorted(adv.repair_sensor) == ["s27", "s3"]


def test_advice_goes_to_the_bore_side_when_the_inner_rim_is_bare():
    # Only two inner sensors, the outer rim densely covered: the inner rim function is the
    # weakly known part, so no pick goes on the outer rim and the first lies in the wall's
    # inner half (the ring a quarter of the way out, which sees both rims).
    pb, est = _problem(n_outer=32, n_inner=2)
    adv = advise(est, pb, count=3)
    assert "outer" not in set(adv.position) and "inner" in set(adv.position)
    rho = pb.domain.relative_radius(adv.points[:1])[0]
    assert rho < 0.5 * (1 + pb.domain.alpha)


@pytest.fixture
def wall_csv(tmp_path):
    pb, _ = _problem(gaps=(5,))
    pts = pb.domain.from_polar(*pb.domain.to_polar(np.vstack([pb.points, pb.gap_points])))
    v = np.r_[pb.y, np.nan]
    df = pd.DataFrame({"sensor": list(pb.sensor) + list(pb.gap_sensor), "x": pts[:, 0] * B,
                       "y": pts[:, 1] * B, "value": v, "sigma": 0.1})
    path = tmp_path / "wall.csv"
    df.to_csv(path, index=False)
    return path


def _run(args, capsys):
    try:
        code = main([str(a) for a in args])
    except SystemExit as exc:
        code = exc.code
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_advise_on_an_annulus(wall_csv, tmp_path, capsys):
    out = tmp_path / "adv"
    code, text, err = _run(["advise", wall_csv, "--domain", "annulus", "--radius", B,
                            "--inner-radius", A, "--out", out, "--count", 4], capsys)
    assert code == 0, err
    cand = pd.read_csv(out / "candidates.csv")
    assert set(cand["position"]) <= {"outer", "inner", "wall"} and len(cand) == 4
    # rim picks carry their angle, wall picks none
    assert np.isfinite(cand["theta_deg"][cand["position"] != "wall"]).all()
    assert json.loads((out / "advice.json").read_text())["target"] == \
        "mean variance over the wall"
    assert "best new sensor: " in text and "repair first: s5" in text


def test_cli_advise_annulus_needs_the_inner_radius(wall_csv, tmp_path, capsys):
    code, _, err = _run(["advise", wall_csv, "--domain", "annulus", "--radius", B, "--out",
                         tmp_path / "adv"], capsys)
    assert code == 2 and err.strip() == "rim-invert: error: --domain annulus needs --inner-radius"
    assert not (tmp_path / "adv").exists()
