"""The annulus basis, field and heat flow against outside references.

Oracles: closed-form harmonic functions (r^n cos n theta, r^-n sin n theta, log r), Python's
``decimal`` module (50-digit sinh ratios), a five-point finite-difference Laplacian, a
second-order finite-difference solution of Laplace's equation on a polar grid (scipy.sparse),
the trapezoid rule on circles (exact for trigonometric polynomials), and the steady radial
conduction through a cylindrical wall (Bergman, Lavine, Incropera & DeWitt, Fundamentals of
Heat and Mass Transfer, 7th ed., section 3.3.1): u = T_i + (T_o - T_i) ln(r/a)/ln(b/a),
heat flow per unit length Q = 2 pi k (T_i - T_o)/ln(b/a).
"""

import decimal
import warnings

import numpy as np
import pandas as pd
import pytest
from scenarios import annulus_laplace_fd

import invert
from invert.diagnostics.heat_flow import heat_flow, rim_flux_profile
from invert.errors import DomainError
from invert.geometry import Annulus, Disk, radial_profiles


def wall_points(d, n, rng):
    """``n`` random points strictly inside the wall (relative radius between the rims)."""
    rho = d.alpha + (1 - d.alpha) * rng.uniform(0.02, 0.98, n)
    return d.from_polar(rho, rng.uniform(0, 2 * np.pi, n))


def coefficients_of(d, outer, inner):
    """Coefficients from the rim functions' Fourier coefficients, given as {name: value}."""
    c = np.zeros(d.n_coef)
    names = d.coefficient_names
    for rim, coefs in (("o", outer), ("i", inner)):
        for k, v in coefs.items():
            c[names.index(f"{rim}_{k}")] = v
    return c


@pytest.mark.parametrize("alpha", [0.1, 0.5, 0.99])
def test_basis_reproduces_closed_form_harmonics(alpha):
    # r^n cos n theta has rim functions b^n cos n theta (outer) and a^n cos n theta (inner), so
    # its coefficients are o_an = b^n, i_an = a^n; likewise r^-n sin n theta and log r. The
    # field must be these functions (algebra: rounding, rtol 1e-11 of the function's scale).
    b, a = 1.3, 1.3 * alpha
    d = Annulus(b, a, (0.2, -0.1), n_modes=5)
    pts = wall_points(d, 50, np.random.default_rng(0))
    dx, dy = pts[:, 0] - 0.2, pts[:, 1] + 0.1
    r, th = np.hypot(dx, dy), np.arctan2(dy, dx)
    for n in (1, 3, 5):
        c = coefficients_of(d, {f"a{n}": b**n}, {f"a{n}": a**n})
        np.testing.assert_allclose(d.field(c, pts), r**n * np.cos(n * th), rtol=0,
                                   atol=1e-11 * b**n)
        c = coefficients_of(d, {f"b{n}": b**-n}, {f"b{n}": a**-n})
        np.testing.assert_allclose(d.field(c, pts), r**-n * np.sin(n * th), rtol=0,
                                   atol=1e-11 * a**-n)
    c = coefficients_of(d, {"a0": np.log(b)}, {"a0": np.log(a)})
    np.testing.assert_allclose(d.field(c, pts), np.log(r), rtol=0, atol=1e-12 * abs(np.log(a)))


def test_radial_profiles_against_50_digit_decimal():
    # sinh(n s)/sinh(n L) in 50-digit decimal arithmetic (Python's decimal module) for thin
    # (a/b = 0.999), medium and thick walls, up to n = 200: the expm1 form is accurate to a few
    # ulps (rtol 1e-13), with no overflow and no cancellation.
    decimal.getcontext().prec = 50
    D = decimal.Decimal

    def ratio(n, s, L):
        if n == 0:
            return s / L
        sinh = lambda x: ((x.exp() - (-x).exp()) / 2)  # noqa: E731
        return sinh(D(n) * s) / sinh(D(n) * L)

    for alpha in ("0.999", "0.5", "0.1"):
        La = -D(alpha).ln()
        s = np.array([0.0, 0.3, 0.7, 1.0]) * float(La)
        s_dec = [D(v) for v in s]
        got, _ = radial_profiles(s, float(La) - s, float(La), 200)
        for j, sd in enumerate(s_dec):
            for n in (0, 1, 2, 7, 50, 200):
                ref = float(ratio(n, sd, La))
                assert got[j, n] == pytest.approx(ref, rel=1e-13, abs=1e-300)


@pytest.mark.parametrize("alpha", [0.1, 0.99])
def test_design_is_well_conditioned_for_thick_and_thin_walls(alpha):
    # On the two rim grids the design is the Fourier matrix of each rim (the constant columns
    # have norm 1, the others 1/sqrt 2 per rim): condition number sqrt 2 to rounding, at any
    # a/b (numpy.linalg.cond). Every column is bounded by 1 in the wall.
    d = Annulus(1.0, alpha, n_modes=32)
    pts, _ = d.rim_grid(256)
    assert np.linalg.cond(d.design(pts)) == pytest.approx(np.sqrt(2), rel=1e-10)
    G = d.design(d.field_grid(81)[0])
    assert np.abs(G).max() <= 1 + 1e-12


@pytest.mark.parametrize("alpha", [0.1, 0.5, 0.9, 0.99])
def test_fast_field_equals_the_design_rows(alpha, rng):
    # Annulus.field sums two power series (Horner) up to a/b = 0.9 and uses the design rows
    # beyond; either way it must equal design @ c (rounding amplified by at most
    # 1/(2 ln(b/a)) ~ 5: 1e-13 of |c|_1).
    d = Annulus(1.2, 1.2 * alpha, (0.3, -0.2), n_modes=16)
    c = rng.standard_normal(d.n_coef)
    pts = np.vstack([wall_points(d, 200, rng), d.rim_grid(40)[0]])
    np.testing.assert_allclose(d.field(c, pts), d.design(pts) @ c, rtol=0,
                               atol=1e-13 * np.abs(c).sum())


def test_field_on_the_rims_equals_the_rim_functions(rng):
    # The column of a rim's Fourier function is that function on its rim and 0 on the other:
    # the field on each rim is its trigonometric sum (numpy cos/sin; rounding, 1e-12).
    d = Annulus(2.0, 0.7, n_modes=6)
    c = rng.standard_normal(d.n_coef)
    pts, cols = d.rim_grid(90)
    th = np.deg2rad(cols["theta_deg"])
    inner = np.asarray(cols["rim"] == "inner")
    names = d.coefficient_names
    want = np.zeros(len(pts))
    for j, name in enumerate(names):
        rim, ab = name.split("_")
        n = int(ab[1:])
        trig = np.cos(n * th) if ab[0] == "a" else np.sin(n * th)
        want += np.where(inner == (rim == "i"), c[j] * trig, 0.0)
    np.testing.assert_allclose(d.field(c, pts), want, rtol=0, atol=1e-12)


def test_field_is_harmonic_by_finite_differences(rng):
    # Five-point Laplacian with h = 1e-4 b: truncation h^2/12 (u_xxxx + u_yyyy) is at most about
    # 2e-6 (near the bore, where the r^-5 terms have fourth derivatives ~ 1e4) and rounding
    # ~ 1e-16 |u| / h^2 ~ 1e-7; the second derivatives themselves are of order 1-10. So the
    # Laplacian must vanish to 2e-5 while u_xx itself does not.
    d = Annulus(1.0, 0.4, n_modes=5)
    c = rng.standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    x = wall_points(d, 30, rng)
    h = 1e-4
    ex, ey = np.array([h, 0.0]), np.array([0.0, h])
    u0 = d.field(c, x)
    uxx = (d.field(c, x + ex) - 2 * u0 + d.field(c, x - ex)) / h**2
    uyy = (d.field(c, x + ey) - 2 * u0 + d.field(c, x - ey)) / h**2
    assert np.abs(uxx + uyy).max() < 2e-5
    assert np.abs(uxx).max() > 1e-1


def test_solution_equals_finite_difference_laplace_solve():
    # Rim functions with a few harmonics; the annulus field (their coefficients) against the
    # finite-difference solution. The scheme is second order: the error at the coarse grid
    # (h_r = 0.0125, h_theta = 2 pi/96) is about 1e-4 of the rim range, and it must fall by
    # about 4 when both spacings halve (3 to 5 accepted), which shows it is discretisation
    # error and not a basis error.
    a, b = 0.5, 1.0
    d = Annulus(b, a, n_modes=4)
    fo = lambda t: 20 + 3 * np.cos(t) - 2 * np.sin(3 * t)  # noqa: E731
    fi = lambda t: 80 + 5 * np.cos(2 * t) + np.sin(t)  # noqa: E731
    c = coefficients_of(d, {"a0": 20, "a1": 3, "b3": -2}, {"a0": 80, "a2": 5, "b1": 1})
    errs = []
    for n_r, n_t in ((41, 96), (81, 192)):
        r, t, U = annulus_laplace_fd(a, b, fo, fi, n_r, n_t)
        pts = d.from_polar(r[:, None] / b, t[None, :])
        errs.append(np.abs(d.field(c, pts) - U.ravel()).max())
    assert errs[1] < 1e-3 * 60  # 60 = range of the rim values
    assert 3.0 < errs[0] / errs[1] < 5.0


def test_heat_flow_row_equals_the_flux_integral_over_any_circle(rng):
    # Q = closed integral of -k du/dr r dtheta, by the trapezoid rule at 64 angles (exact for
    # the degree <= 6 trigonometric polynomial on each circle), at three radii in the wall: it
    # equals heat_flow_row . c (rounding, rtol 1e-10) - the same through every circle.
    d = Annulus(1.5, 0.6, n_modes=6)
    c = rng.standard_normal(d.n_coef)
    k = 16.0
    th = 2 * np.pi * np.arange(64) / 64
    for rho in (d.alpha, 0.7, 1.0):
        pts = d.from_polar(rho, th)
        q = -k * d.design_normal_derivative(pts) @ c
        Q = np.mean(q) * 2 * np.pi * rho * d.radius
        assert Q == pytest.approx(d.heat_flow_row(k) @ c, rel=1e-10)


def test_locate_rejects_the_bore_and_outside_and_snaps_near_rims():
    d = Annulus(1.0, 0.5, n_modes=3)
    with pytest.raises(DomainError, match=r"inside the bore: r = 0\.3 < inner radius 0\.5") as e:
        d.locate([[0.8, 0.0], [0.3, 0.0]])
    assert e.value.index == 1
    with pytest.raises(DomainError, match=r"outside the wall: r = 1\.2 > outer radius 1"):
        d.locate([[0.0, 1.2]])
    w, on_rim, n = d.locate([[0.4996, 0.0], [1.0004, 0.0], [0.75, 0.0]])
    np.testing.assert_allclose(np.abs(w), [0.5, 1.0, 0.75], rtol=1e-15)
    assert on_rim.tolist() == [True, True, False] and n == 2


def _radial_readings(rng, a, b, Ti, To, sigma, n_outer=24, n_inner=12):
    th_o = 2 * np.pi * np.arange(n_outer) / n_outer
    th_i = 2 * np.pi * (np.arange(n_inner) + 0.5) / n_inner
    pts = np.vstack([b * np.column_stack([np.cos(th_o), np.sin(th_o)]),
                     a * np.column_stack([np.cos(th_i), np.sin(th_i)])])
    u = np.r_[np.full(n_outer, To), np.full(n_inner, Ti)]
    v = u + sigma * rng.standard_normal(len(u))
    v[[3, 4, n_outer + 2]] = np.nan  # failed sensors: gaps on both rims
    return pd.DataFrame({"x": pts[:, 0], "y": pts[:, 1], "value": v, "sigma": sigma})


@pytest.mark.parametrize("method", ["tikhonov", "gaussian"])
def test_radial_conduction_through_a_cylindrical_wall(method):
    # Steel pipe wall (k = 16 W/m/K), bore 50 mm, outside 80 mm, 180 C inside, 60 C outside,
    # readings with 0.2 K noise on both rims: the textbook profile and heat flow (Bergman et
    # al., section 3.3.1) lie inside the 90 % intervals of the fit, and the intervals are narrow
    # (sd of Q below 0.2 % of Q, well determined by 33 readings).
    a, b, Ti, To, k = 0.05, 0.08, 180.0, 60.0, 16.0
    df = _radial_readings(np.random.default_rng(3), a, b, Ti, To, 0.2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = invert.fit(df, radius=b, kind="annulus", inner_radius=a, method=method)
    Q = 2 * np.pi * k * (Ti - To) / np.log(b / a)
    flow = heat_flow(est, k, 0.9)
    assert flow.lower <= Q <= flow.upper and flow.sd < 2e-3 * Q
    assert flow.unit == "W/m"
    r = np.linspace(a, b, 7)[1:-1]
    pts = np.column_stack([r, np.zeros_like(r)])
    s = est.at(pts, 0.9)
    u = Ti + (To - Ti) * np.log(r / a) / np.log(b / a)
    assert np.all((s.lower <= u) & (u <= s.upper))
    # The rim flux densities integrate to the same Q on both rims (trapezoid, exact for the
    # truncated trigonometric sums; rounding 1e-9 relative).
    prof = rim_flux_profile(est, k, 0.9, 360)
    for rim, radius in (("outer", b), ("inner", a)):
        q = prof.loc[prof["rim"] == rim, "mean"].to_numpy()
        assert np.mean(q) * 2 * np.pi * radius == pytest.approx(flow.mean, rel=1e-9)


def test_heat_flow_without_conductivity_is_per_unit_conductivity():
    a, b = 0.05, 0.08
    df = _radial_readings(np.random.default_rng(4), a, b, 100.0, 40.0, 0.1)
    est = invert.fit(df, radius=b, kind="annulus", inner_radius=a)
    one, k = heat_flow(est, None, 0.9), heat_flow(est, 16.0, 0.9)
    assert one.unit == "per unit conductivity" and one.conductivity is None
    # linear in k (algebra: rounding)
    assert k.mean == pytest.approx(16.0 * one.mean, rel=1e-12)
    assert k.sd == pytest.approx(16.0 * one.sd, rel=1e-12)
    # a disk has no bore and so no net heat flow
    assert heat_flow(invert.fit(df.iloc[:24], radius=b), 16.0) is None


def test_small_bore_with_outer_readings_approaches_the_disk_fit():
    # Outer readings only, a fixed lambda and noise (so both fits use the same model of the
    # outer rim function). The outer columns on the outer rim are exactly the disk's rim
    # columns and the inner ones vanish there, so the rim estimate (mean and sd) equals the
    # disk's at every a/b (mean: rounding, 1e-10; sd: see below). Inside, the degree-n >= 1 profiles
    # f_n = (rho^n - (alpha^2/rho)^n)/(1 - alpha^(2n)) differ from the disk's rho^n by at most
    # about 2 alpha^2 / rho: at a/b = 1e-3 and rho >= 0.25 the fitted fields without their
    # degree-0 parts agree with the disk's to 1e-4 of the rim range.
    rng = np.random.default_rng(5)
    b = 1.0
    th = 2 * np.pi * np.arange(32) / 32
    dsk = Disk(b, (0.0, 0.0), 8)
    c = np.r_[50.0, 4 * rng.standard_normal(dsk.n_coef - 1) / (1 + dsk.degrees[1:]) ** 2]
    pts = dsk.from_polar(1.0, th)
    df = pd.DataFrame({"x": pts[:, 0], "y": pts[:, 1], "value": dsk.field(c, pts) +
                       0.05 * rng.standard_normal(32), "sigma": 0.05})
    opts = dict(rule="fixed", lam=0.05, n_modes=8, s=2.0)
    disk = invert.fit(df, radius=b, **opts)
    rim = dsk.from_polar(1.0, np.linspace(0, 2 * np.pi, 50))
    inside = dsk.from_polar(np.linspace(0.25, 0.95, 8)[:, None], th[None, ::4])
    for alpha in (0.1, 1e-3):
        ann = invert.fit(df, radius=b, kind="annulus", inner_radius=alpha * b, **opts)
        sa, sd_ = ann.at(rim), disk.at(rim)
        np.testing.assert_allclose(sa.mean, sd_.mean, rtol=0, atol=1e-10)
        # The sd carries rounding from the unobserved inner mean level (prior sd 1e4 tau, so
        # variance 1e8 tau^2 in the covariance whose square root Estimate takes): eps * 1e8
        # relative to point variances ~1e-3 gives ~1e-4 in the sd; rtol 1e-3.
        np.testing.assert_allclose(sa.sd, sd_.sd, rtol=1e-3)
        if alpha == 1e-3:
            keep = ann.domain.degrees > 0
            ua = ann.domain.design(inside)[:, keep] @ ann.mean[keep]
            ud = dsk.design(inside)[:, 1:] @ disk.mean[1:]
            assert np.abs(ua - ud).max() < 1e-4 * np.ptp(df["value"])
    # What does not approach the disk: the bore's own level (degree 0) enters the wall through
    # ln(b/r)/ln(b/a), which vanishes only like 1/ln(b/a); outer readings say nothing about it,
    # so with independent rim priors the interior sd stays large as a -> 0.
    s_in = ann.at(inside[:1])
    pytest.xfail(f"independent rim priors: interior sd {s_in.sd[0]:.3g} at a/b = 1e-3 (disk: "
                 f"{disk.at(inside[:1]).sd[0]:.3g}); coupling the rims' mean levels is a later "
                 "step")
