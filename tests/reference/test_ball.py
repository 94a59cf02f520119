"""The ball domain: basis, kernels, reproduction, gradients, stages and calibration.

Every check names the outside source it is compared with. Tolerances: 1e-13/1e-12 for algebra
and exact quadrature in double precision (sums of a few hundred O(1) terms), looser ones are
justified where they appear (finite differences, truncation bounds, Monte-Carlo error).
"""

import warnings

import numpy as np
import pytest
from scipy import special

from invert import (
    RULES,
    Ball,
    DomainError,
    LinearProblem,
    SmoothnessPrior,
    Tikhonov,
    ball_poisson_kernel,
    fit,
    make_domain,
    poisson_kernel,
    poisson_kernel_nd,
    real_sph_harm,
    truncation_degree,
)
from invert.geometry.ball import BALL_MAX_DEGREE, BALL_TRUNCATION_TOL


def gl_sphere(n_lat):
    """Product Gauss-Legendre (cos of polar angle) x uniform (azimuth) rule on the unit sphere,
    built here from numpy alone; weights sum to 4 pi. Exact for degree <= 2 n_lat - 1."""
    t, w = np.polynomial.legendre.leggauss(n_lat)
    n_lon = 2 * n_lat
    phi = np.arange(n_lon) * 2 * np.pi / n_lon
    T, P = np.meshgrid(np.arccos(t), phi, indexing="ij")
    W = np.repeat(w, n_lon) * (2 * np.pi / n_lon)
    pts = np.column_stack([np.sin(T.ravel()) * np.cos(P.ravel()),
                           np.sin(T.ravel()) * np.sin(P.ravel()), np.cos(T.ravel())])
    return T.ravel(), P.ravel(), pts, W


def fibonacci_sphere(n):
    """Nearly even points on the unit sphere (golden-angle spiral)."""
    i = np.arange(n) + 0.5
    z = 1 - 2 * i / n
    phi = np.pi * (1 + 5**0.5) * i
    r = np.sqrt(1 - z * z)
    return np.column_stack([r * np.cos(phi), r * np.sin(phi), z])


def random_interior(rng, n, rho_max=0.9):
    v = rng.standard_normal((n, 3))
    v /= np.linalg.norm(v, axis=1)[:, None]
    return v * rho_max * rng.random((n, 1)) ** (1 / 3)


# --- spherical harmonics --------------------------------------------------------------------
def test_real_harmonics_orthonormal_under_gauss_legendre_product_rule():
    # Orthonormality of real spherical harmonics (DLMF §14.30): Gram matrix to degree 6 on a Gauss-
    # Legendre x uniform grid = I to 4e-14.
    # 8 nodes integrate degree <= 15 exactly, more than the degree-12 products needed.
    T, P, _, W = gl_sphere(8)
    lm = [(ell, m) for ell in range(7) for m in range(-ell, ell + 1)]
    Y = np.array([real_sph_harm(ell, m, T, P) for ell, m in lm])
    gram = (Y * W) @ Y.T
    np.testing.assert_allclose(gram, np.eye(len(lm)), atol=1e-13)


def test_design_columns_orthonormal_under_surface_mean_with_constant_one():
    # The chosen normalisation (module notes): B = sqrt(4 pi) Y, so the mean over the sphere of
    # B_j B_k is delta_jk and the constant column is exactly 1. Exact quadrature -> 1e-13.
    b = Ball(1.7, (0.3, -0.1, 2.0), 8)
    pts, w = b.rim_quadrature()
    B = b.design(pts)
    np.testing.assert_allclose(B[:, 0], 1.0, rtol=0, atol=1e-15)
    np.testing.assert_allclose((B * w[:, None]).T @ B, np.eye(b.n_coef), atol=1e-13)
    # the same with the independent numpy rule (weights / 4 pi)
    T, P, u, W = gl_sphere(9)
    B2 = b.design(b.center + b.radius * u)
    np.testing.assert_allclose((B2 * (W / (4 * np.pi))[:, None]).T @ B2, np.eye(b.n_coef),
                               atol=1e-13)


def test_check_values_y00_and_degree_one():
    # DLMF §14.30: Y00 = 1/(2 sqrt(pi)) = 0.28209479177387814; Y_{1,1} = sqrt(3/4pi) x/r,
    # Y_{1,-1} = sqrt(3/4pi) y/r; Y_{1,0} = sqrt(3/4pi) z/r (standard table, e.g. DLMF 14.30).
    rng = np.random.default_rng(0)
    T, P = rng.uniform(0, np.pi, 20), rng.uniform(-np.pi, np.pi, 20)
    assert real_sph_harm(0, 0, T, P) == pytest.approx(0.28209479177387814, rel=1e-15)
    x, y, z = np.sin(T) * np.cos(P), np.sin(T) * np.sin(P), np.cos(T)
    k = np.sqrt(3 / (4 * np.pi))
    np.testing.assert_allclose(real_sph_harm(1, 1, T, P), k * x, atol=1e-15)
    np.testing.assert_allclose(real_sph_harm(1, -1, T, P), k * y, atol=1e-15)
    np.testing.assert_allclose(real_sph_harm(1, 0, T, P), k * z, atol=1e-15)
    # Degree 2 closed forms (standard real-harmonic table): Y_{2,-2} = (1/2) sqrt(15/pi) xy,
    # Y_{2,2} = (1/4) sqrt(15/pi) (x^2 - y^2), Y_{2,0} = (1/4) sqrt(5/pi) (3z^2 - 1).
    np.testing.assert_allclose(real_sph_harm(2, -2, T, P), 0.5 * np.sqrt(15 / np.pi) * x * y,
                               atol=1e-14)
    np.testing.assert_allclose(real_sph_harm(2, 2, T, P),
                               0.25 * np.sqrt(15 / np.pi) * (x * x - y * y), atol=1e-14)
    np.testing.assert_allclose(real_sph_harm(2, 0, T, P),
                               0.25 * np.sqrt(5 / np.pi) * (3 * z * z - 1), atol=1e-14)


@pytest.mark.parametrize("ell", [1, 2, 5, 12])
def test_addition_theorem(ell):
    # DLMF §14.30.9: sum_m Y_l^m(u1) conj(Y_l^m(u2)) = (2l+1)/(4pi) P_l(u1.u2); the real
    # harmonics are a unitary transform of the complex ones of each degree, so the same holds,
    # and for the design columns (scaled by sqrt(4 pi)) the right side is (2l+1) P_l.
    rng = np.random.default_rng(ell)
    u = rng.standard_normal((2, 30, 3))
    u /= np.linalg.norm(u, axis=-1, keepdims=True)
    cosg = np.sum(u[0] * u[1], axis=1)
    b = Ball(1.0, (0, 0, 0), ell)
    sel = b.degrees == ell
    lhs = np.sum(b.design(u[0])[:, sel] * b.design(u[1])[:, sel], axis=1)
    np.testing.assert_allclose(lhs, (2 * ell + 1) * special.eval_legendre(ell, cosg),
                               atol=1e-12 * (2 * ell + 1))
    T0, P0 = np.arccos(u[0][:, 2]), np.arctan2(u[0][:, 1], u[0][:, 0])
    T1, P1 = np.arccos(u[1][:, 2]), np.arctan2(u[1][:, 1], u[1][:, 0])
    ms = np.arange(-ell, ell + 1)[:, None]
    lhs2 = np.sum(real_sph_harm(ell, ms, T0, P0) * real_sph_harm(ell, ms, T1, P1), axis=0)
    np.testing.assert_allclose(lhs2, (2 * ell + 1) / (4 * np.pi) * special.eval_legendre(ell, cosg),
                               atol=1e-13 * (2 * ell + 1))


# --- Poisson kernel -----------------------------------------------------------------------
@pytest.mark.parametrize("radius", [1.0, 2.5])
def test_ball_kernel_integrates_to_one(radius):
    # Evans, PDE §2.2.4: the integral over |zeta| = R is 1. The kernel is analytic
    # on the sphere for |x| <= 0.7 R and the Gauss-Legendre product rule converges like
    # (|x|/R)^n, so 80 nodes give double precision; tolerance 1e-12.
    _, _, u, W = gl_sphere(80)
    rng = np.random.default_rng(1)
    for x in random_interior(rng, 6, 0.7) * radius:
        total = np.sum(ball_poisson_kernel(x, radius * u, radius) * W * radius**2)
        assert total == pytest.approx(1.0, abs=1e-12)


def test_ball_kernel_series_check_value():
    # Series P = sum (2l+1)/(4 pi) r^l P_l(cos gamma) (Axler, Bourdon & Ramey): unit ball, r = 0.5,
    # cos gamma = 0.3: 0.0644563919366958, and the series
    # sum (2l+1)/(4pi) r^l P_l(cos gamma) (Axler, Bourdon & Ramey ch. 5), summed here to l = 80
    # (terms fall like 0.5^l: remainder < 1e-22).
    x = np.array([0.5 * np.sqrt(1 - 0.09), 0.0, 0.5 * 0.3])
    zeta = np.array([0.0, 0.0, 1.0])
    ell = np.arange(81)
    series = np.sum((2 * ell + 1) / (4 * np.pi) * 0.5**ell * special.eval_legendre(ell, 0.3))
    assert ball_poisson_kernel(x, zeta) == pytest.approx(0.0644563919366958, rel=1e-13)
    assert series == pytest.approx(0.0644563919366958, rel=1e-13)


def test_kernel_nd_reduces_to_disk_and_ball():
    # omega_{n-1} = 2 pi^{n/2} / Gamma(n/2) (Evans §2.2.4): n = 2 gives 2 pi and the disk kernel
    # (a density in arc length; invert.geometry.disk.poisson_kernel is a density in angle,
    # dS = R dphi);
    # n = 3 gives 4 pi and the ball kernel. Same formula, so agreement is to rounding (1e-13).
    rng = np.random.default_rng(2)
    R = 1.8
    r, th, ph = rng.uniform(0, 0.95 * R, 20), rng.uniform(-np.pi, np.pi, 20), rng.uniform(0, 7, 20)
    x = np.column_stack([r * np.cos(th), r * np.sin(th)])
    zeta = R * np.column_stack([np.cos(ph), np.sin(ph)])
    np.testing.assert_allclose(R * poisson_kernel_nd(x, zeta, R), poisson_kernel(r, th, ph, R),
                               rtol=1e-13)
    x3 = random_interior(rng, 20) * R
    z3 = R * fibonacci_sphere(20)
    np.testing.assert_allclose(poisson_kernel_nd(x3, z3, R), ball_poisson_kernel(x3, z3, R),
                               rtol=1e-13)


def test_kernel_nd_integrates_to_one_in_four_dimensions():
    # omega_3 = 2 pi^2 in R^4. Integrate over S^3 with Hopf-type coordinates
    # (cos a, sin a cos b, sin a sin b cos c, sin a sin b sin c), dS = sin^2 a sin b da db dc,
    # by Gauss-Legendre in a and b and the uniform rule in c; x near the centre keeps the
    # integrand smooth, so 60 nodes give ~1e-12.
    ta, wa = np.polynomial.legendre.leggauss(60)
    a = (ta + 1) * np.pi / 2
    wa = wa * np.pi / 2
    bb, cc = a, np.arange(60) * 2 * np.pi / 60
    A, B, C = np.meshgrid(a, bb, cc, indexing="ij")
    w = (wa[:, None, None] * wa[None, :, None] * (2 * np.pi / 60)
         * np.sin(A) ** 2 * np.sin(B))
    zeta = np.stack([np.cos(A), np.sin(A) * np.cos(B), np.sin(A) * np.sin(B) * np.cos(C),
                     np.sin(A) * np.sin(B) * np.sin(C)], axis=-1)
    x = np.array([0.1, -0.2, 0.15, 0.05])
    assert np.sum(poisson_kernel_nd(x, zeta) * w) == pytest.approx(1.0, abs=1e-10)


def test_poisson_integral_equals_series_and_mean_value():
    # Poisson integral u(x) = int P(x, zeta) f(zeta) dS (Evans §2.2.4) of band-limited surface
    # data must equal the solid-harmonic series, and u(centre) = c_00 = surface mean (mean-value
    # property). The closed-form kernel and the basis are independent; quadrature of the smooth
    # integrand at |x| <= 0.6 R is exact to ~1e-12.
    rng = np.random.default_rng(3)
    b = Ball(2.0, (1.0, -1.0, 0.5), 6)
    c = rng.standard_normal(b.n_coef)
    _, _, u, W = gl_sphere(90)
    zeta = b.radius * u
    f = b.field(c, b.center + zeta)
    x = random_interior(rng, 8, 0.6) * b.radius
    P = ball_poisson_kernel(x[:, None, :], zeta[None, :, :], b.radius)
    integral = P @ (f * W * b.radius**2)
    np.testing.assert_allclose(integral, b.field(c, b.center + x), atol=1e-11)
    mean = np.sum(f * W) / (4 * np.pi)
    assert b.field(c, [b.center])[0] == pytest.approx(c[0], abs=1e-14)
    assert c[0] == pytest.approx(mean, abs=1e-12)


# --- reproduction -----------------------------------------------------------------------------
HARMONIC_POLYNOMIALS = {
    "x2-y2": lambda q: q[:, 0] ** 2 - q[:, 1] ** 2,
    "xyz": lambda q: q[:, 0] * q[:, 1] * q[:, 2],
    "2z2-x2-y2": lambda q: 2 * q[:, 2] ** 2 - q[:, 0] ** 2 - q[:, 1] ** 2,
}


@pytest.mark.parametrize("name", list(HARMONIC_POLYNOMIALS))
def test_harmonic_polynomials_reproduced_forward(name):
    # A harmonic polynomial of degree <= 3 is its own extension (it is harmonic): quadrature
    # coefficients of its surface values (exact for band-limited data) must give it back inside
    # to rounding, 1e-13.
    f = HARMONIC_POLYNOMIALS[name]
    b = Ball(1.3, (0.2, 0.0, -0.4), 5)
    local = lambda p: f((p - np.asarray(b.center)) / b.radius)  # noqa: E731
    pts, _ = b.rim_quadrature()
    c = b.rim_coefficients(local(pts))
    assert np.all(np.abs(c[b.degrees > 3]) < 1e-13)
    x = b.center + b.radius * random_interior(np.random.default_rng(4), 50, 1.0)
    np.testing.assert_allclose(b.field(c, x), local(x), atol=1e-13)


def test_known_coefficient_of_x2_minus_y2():
    # Standard table: Y_{2,2} = (1/4) sqrt(15/pi) (x^2 - y^2)/r^2, so with B = sqrt(4 pi) Y the
    # column l=2, m=2 (index 4 + 2 + 2 = 8) is (sqrt(15)/2)(x^2 - y^2) and x^2 - y^2 has
    # coefficient 2/sqrt(15) there and nothing elsewhere.
    b = Ball(1.0, (0, 0, 0), 4)
    pts, _ = b.rim_quadrature()
    c = b.rim_coefficients(pts[:, 0] ** 2 - pts[:, 1] ** 2)
    expected = np.zeros(b.n_coef)
    expected[8] = 2 / np.sqrt(15)
    np.testing.assert_allclose(c, expected, atol=1e-14)


def test_rim_data_x1_squared_check_value():
    # Harmonic polynomial check (Axler, Bourdon & Ramey): rim data x1^2 on the unit sphere gives u =
    # 1/3 + (2x1^2 - x2^2 - x3^2)/3,
    # 0.326666666666667 at (0.3, -0.2, 0.4), u(0) = 1/3. Checked through the basis and through
    # the closed-form kernel (quadrature with 90 nodes, 1e-12).
    b = Ball(1.0, (0, 0, 0), 4)
    pts, _ = b.rim_quadrature()
    c = b.rim_coefficients(pts[:, 0] ** 2)
    x = np.array([[0.3, -0.2, 0.4], [0.0, 0.0, 0.0]])
    np.testing.assert_allclose(b.field(c, x), [0.326666666666667, 1 / 3], atol=1e-14)
    _, _, u, W = gl_sphere(90)
    via_kernel = ball_poisson_kernel(x[:, None, :], u[None]) @ (u[:, 0] ** 2 * W)
    np.testing.assert_allclose(via_kernel, [0.326666666666667, 1 / 3], atol=1e-12)


def test_point_source_outside_reproduced_within_truncation_bound():
    # 1/|x - x0| with |x0| = a R > R is harmonic in the ball; its expansion
    # sum_l r^l / |x0|^(l+1) P_l(cos gamma) (Axler, Bourdon & Ramey ch. 5) truncated at L leaves
    # at most sum_{l>L} rho^l / (a^(l+1) R) inside; the quadrature (n_lat = 60) is exact for the
    # kept degrees up to an aliasing error of the same order at rho = 1. Tolerance: 3x that
    # bound at rho = 1 (the bound is not tight: it ignores the P_l <= 1 slack).
    R, a, L = 1.5, 2.5, 24
    b = Ball(R, (0.1, 0.2, -0.3), L)
    x0 = np.asarray(b.center) + a * R * np.array([0.6, 0.0, 0.8])
    f = lambda p: 1.0 / np.linalg.norm(p - x0, axis=-1)  # noqa: E731
    pts, _ = b.rim_quadrature(60)
    c = b.rim_coefficients(f(pts), 60)
    x = b.center + R * random_interior(np.random.default_rng(5), 40, 1.0)
    ell = np.arange(L + 1, 400)
    bound = np.sum(1.0 / a ** (ell + 1)) / R
    err = np.abs(b.field(c, x) - f(x))
    assert err.max() <= 3 * bound, (err.max(), bound)
    # interior points at rho <= 0.6 are far more accurate: (0.6/2.5)^25 ~ 3e-16 -> rounding
    inner = b.center + R * random_interior(np.random.default_rng(6), 40, 0.6)
    np.testing.assert_allclose(b.field(c, inner), f(inner), rtol=1e-13)


@pytest.mark.parametrize("name", [*HARMONIC_POLYNOMIALS, "point_source"])
def test_recovered_from_dense_exact_data_by_tikhonov(name):
    # Dense exact surface data (400 points, 169 columns) determine every coefficient; the stage
    # must return the harmonic function inside. sigma = 1e-8 is the stated accuracy of the data;
    # the polynomials come back to 1e-9 (algebra with condition numbers ~1e3). For the point
    # source (a = 4.6) the omitted degrees > 12 carry at most sum_{l>12} 1/a^(l+1) ~ 6e-10 on the
    # sphere, and are damped by rho^l inside; tolerance 1e-8.
    b = Ball(1.5, (0.2, 0.0, -0.1), 12)
    if name == "point_source":
        x0 = np.array([4.5, 0.75, -0.75])
        f = lambda q: 1.0 / np.linalg.norm(q - x0, axis=1)  # noqa: E731
    else:
        f = HARMONIC_POLYNOMIALS[name]
    local = lambda p: f((p - np.asarray(b.center)) / b.radius)  # noqa: E731
    P = b.center + b.radius * fibonacci_sphere(400)
    y = local(P)
    prob = LinearProblem(b.design(P), y, np.full(len(y), 1e-8), b.degrees, b.eigenvalues, b)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = Tikhonov("evidence").fit(prob)
    x = b.center + b.radius * random_interior(np.random.default_rng(7), 50, 0.85)
    s = est.at(x)
    np.testing.assert_allclose(s.mean, local(x), atol=1e-8)
    assert np.all(s.sd < 1e-7)


# --- gradients and evaluation -----------------------------------------------------------------
def test_design_gradient_matches_finite_differences():
    # Central differences with h = 1e-5 have error ~h^2 |u'''| ~ 1e-10 plus rounding
    # ~eps/h ~ 1e-11 times the column size (<= ~10 at degree 8): tolerance 1e-7. Includes the
    # centre and points on the polar axis, where spherical coordinates are singular.
    b = Ball(0.8, (0.5, -0.5, 1.0), 8)
    rng = np.random.default_rng(8)
    c0 = np.asarray(b.center)
    p = np.vstack([c0 + b.radius * random_interior(rng, 30, 0.9),
                   c0, c0 + [0, 0, 0.3], c0 - [0, 0, 0.5]])
    D = b.design_gradient(p)
    h = 1e-5
    FD = np.stack([(b.design(p + h * e) - b.design(p - h * e)) / (2 * h) for e in np.eye(3)],
                  axis=1)
    np.testing.assert_allclose(D, FD, atol=1e-7)
    coef = rng.standard_normal(b.n_coef)
    np.testing.assert_allclose(b.gradient(coef, p), D @ coef, atol=1e-12)


def test_gradient_of_known_harmonic():
    # u = x^2 - y^2 (in scaled coordinates) has gradient (2x, -2y, 0)/R.
    b = Ball(2.0, (0, 0, 0), 3)
    pts, _ = b.rim_quadrature()
    c = b.rim_coefficients((pts[:, 0] ** 2 - pts[:, 1] ** 2) / 4.0)  # (X/R)^2 - (Y/R)^2
    x = random_interior(np.random.default_rng(9), 20, 1.0) * 2.0
    np.testing.assert_allclose(b.gradient(c, x),
                               np.column_stack([x[:, 0] / 2, -x[:, 1] / 2, 0 * x[:, 0]]),
                               atol=1e-13)
    # radial derivative on the sphere: sum (l/R) c B -> 2/R * u for this degree-2 field
    on = b.center + 2.0 * fibonacci_sphere(10)
    np.testing.assert_allclose(b.design_normal_derivative(on) @ c,
                               (2 / 2.0) * b.field(c, on), atol=1e-13)


def test_field_agrees_with_design_in_blocks_and_stacks(rng):
    # field() evaluates block by block; it must equal design() @ coef (algebra, 1e-12), also
    # across block boundaries and for a stack of coefficient vectors.
    b = Ball(1.0, (0, 0, 0), 10)
    p = random_interior(rng, 5000, 1.0)
    C = rng.standard_normal((3, b.n_coef))
    G = b.design(p)
    np.testing.assert_allclose(b.field(C[0], p), G @ C[0], atol=1e-12)
    np.testing.assert_allclose(b.field(C, p), C @ G.T, atol=1e-12)


def test_solid_harmonics_are_harmonic():
    # Laplacian by the 7-point stencil (h = 1e-3: error ~h^2 |u''''| ~ 1e-5 for degree <= 6).
    b = Ball(1.0, (0, 0, 0), 6)
    p = random_interior(np.random.default_rng(10), 10, 0.8)
    h = 1e-3
    lap = sum(b.design(p + h * e) + b.design(p - h * e) - 2 * b.design(p) for e in np.eye(3))
    assert np.abs(lap / h**2).max() < 1e-4


# --- geometry, grids, validation --------------------------------------------------------------
def test_interface_matches_disk():
    # Every public attribute a stage or output reads from a Disk exists on a Ball.
    from invert import Disk

    b = Ball(1.0, (0, 0, 0), 4)
    for name in ("dim", "kind", "n_coef", "degrees", "eigenvalues", "degree_multiplicity",
                 "degree_eigenvalue", "with_modes", "describe", "locate", "design",
                 "design_gradient", "field", "gradient", "rim_grid", "field_grid",
                 "rim_coefficients", "normal_flux", "design_normal_derivative"):
        assert hasattr(Disk, name) and hasattr(b, name), name
    assert (b.dim, b.kind, b.n_coef) == (3, "ball", 25)
    np.testing.assert_array_equal(np.bincount(b.degrees), 2 * np.arange(5) + 1)
    np.testing.assert_array_equal(b.eigenvalues, b.degrees * (b.degrees + 1))
    assert b.with_modes(7) == Ball(1.0, (0, 0, 0), 7)
    assert b.describe()["domain"] == "ball"


def test_locate_snaps_and_rejects():
    b = Ball(2.0, (1.0, 0.0, 0.0), 2)
    pts = np.array([[1.0, 0.0, 0.0], [3.0, 0.0, 0.0], [1.0, 0.0, 2.001], [1.0, 1.0, 0.0]])
    xi, on_rim, n_snapped = b.locate(pts)
    np.testing.assert_allclose(np.linalg.norm(xi, axis=1), [0, 1, 1, 0.5])
    np.testing.assert_array_equal(on_rim, [False, True, True, False])
    assert n_snapped == 1
    with pytest.raises(DomainError, match="outside the ball") as exc:
        b.locate(np.vstack([pts, [[1.0, 0.0, 2.1]]]))
    assert exc.value.index == 4
    with pytest.raises(DomainError, match="non-finite") as exc:
        b.locate([[0.0, np.nan, 0.0]])
    assert exc.value.index == 0
    with pytest.raises(ValueError, match=r"shape \(n_points, 3\)"):
        b.design([[0.0, 0.0]])
    with pytest.raises(ValueError, match="'radius' of Ball"):
        Ball(-1.0)
    with pytest.raises(ValueError, match="'center' of Ball"):
        Ball(1.0, (0.0, 0.0))


def test_grids():
    b = Ball(2.0, (1.0, -1.0, 0.5), 2)
    pts, cols = b.rim_grid(360)
    assert len(pts) == 37 * 72 >= 360
    np.testing.assert_allclose(np.linalg.norm(pts - b.center, axis=1), 2.0)
    rho, polar, az = b.to_spherical(pts)
    np.testing.assert_allclose(90 - np.rad2deg(polar), cols["lat_deg"], atol=1e-12)
    away = np.abs(cols["lat_deg"]) < 90  # longitude is undefined at the poles
    dlon = np.mod(np.rad2deg(az[away]) - cols["lon_deg"][away] + 180, 360) - 180
    np.testing.assert_allclose(dlon, 0.0, atol=1e-9)
    assert cols["lon_deg"].min() == -180 and cols["lon_deg"].max() < 180
    fpts, fcols = b.field_grid(21)
    assert set(fcols) == {"x", "y", "z"}
    assert np.all(np.linalg.norm(fpts - b.center, axis=1) <= 2.0 + 1e-12)
    on_plane = np.isclose(fpts - b.center, 0.0).any(axis=1)
    assert on_plane.all()
    us, vs, spts, inside = b.slice_grid(11, "x")
    np.testing.assert_allclose(spts[:, 0], 1.0)
    assert inside.sum() < 121 and len(us) == len(vs) == 11
    with pytest.raises(ValueError, match="'axis' parameter"):
        b.slice_grid(11, "w")


# --- truncation and stages ----------------------------------------------------------------
def test_make_domain_ball_truncation_and_checks():
    # Defaults documented in invert.geometry.ball: tol 3e-3 (met at L = 24 for s = 2), cap 24.
    d = make_domain(1.0, kind="ball", s=2.0)
    assert d.kind == "ball" and d.n_modes == truncation_degree(
        Ball(), 2.0, tol=BALL_TRUNCATION_TOL, maximum=BALL_MAX_DEGREE) == BALL_MAX_DEGREE == 24
    assert truncation_degree(Ball(), 2.0, tol=BALL_TRUNCATION_TOL) == 24  # not capped
    assert make_domain(1.0, kind="ball", s=1.5).n_modes == BALL_MAX_DEGREE  # capped
    assert make_domain(1.0, kind="ball", s=2.5).n_modes == 9
    assert make_domain(1.0, kind="ball", s=3.0).n_modes == 8
    assert make_domain(1.0, kind="ball", n_modes=5).n_coef == 36
    with pytest.raises(ValueError, match="'s' parameter must be > 1 for a ball"):
        make_domain(1.0, kind="ball", s=1.0)
    with pytest.raises(ValueError, match="3 coordinates"):
        make_domain(1.0, (0.0, 0.0), kind="ball")


def _shell_problem(rng, n=40, hole=0.6):
    """Sensors on a randomly rotated Fibonacci shell with a missing cap of half-angle ``hole``
    (radians), plus 3 interior probes. Returns the points and the cap's direction."""
    Q, _ = np.linalg.qr(rng.standard_normal((3, 3)))
    P = fibonacci_sphere(n) @ Q.T
    cap = Q[:, 2]
    P = P[P @ cap < np.cos(hole)]
    return np.vstack([P, fibonacci_sphere(3) @ Q.T * rng.uniform(0.2, 0.7, (3, 1))]), cap


def truth_coef(rng, d, s=2.0):
    v = SmoothnessPrior(s=s).variances(d.eigenvalues, d.degrees)
    v[0] = 1.0
    c = np.sqrt(v) * rng.standard_normal(d.n_coef)
    c[0] += 20.0
    return c


def test_every_tikhonov_rule_runs_on_the_ball_and_matches_normal_equations():
    # The stage sees only the linear problem. For each rule, the returned mean must equal the
    # regularised normal-equation solution (G'WG + lam D^-2) c = G'Wy at the chosen lam, with
    # D = prior sd pattern (Bishop 2006 §3.3: MAP = Tikhonov), solved here directly; condition
    # numbers ~1e8 -> tolerance 1e-6 relative to the coefficient scale.
    rng = np.random.default_rng(11)
    d = Ball(1.0, (0, 0, 0), 10)
    P, _ = _shell_problem(rng)
    sigma = 0.05
    c = truth_coef(rng, d)
    y = d.design(P) @ c + sigma * rng.standard_normal(len(P))
    G = d.design(P)
    prob = LinearProblem(G, y, np.full(len(y), sigma), d.degrees, d.eigenvalues, d)
    dsd = np.sqrt(SmoothnessPrior(s=2.0).shape(d.eigenvalues, d.degrees))
    x = np.array([[0.0, 0.0, 0.0], [0.2, 0.3, -0.1]])
    for rule in RULES:
        opts = {"lam": 0.3} if rule == "fixed" else {}
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            est = Tikhonov(rule, **opts).fit(prob)
        lam = est.info["lam"]
        A = G.T @ G / sigma**2 + lam * np.diag(1 / dsd**2)
        direct = np.linalg.solve(A, G.T @ y / sigma**2)
        np.testing.assert_allclose(est.mean, direct, atol=1e-6 * np.abs(direct).max(), err_msg=rule)
        s = est.at(x)
        assert np.all(np.isfinite(s.mean)) and np.all(s.sd > 0), rule
        assert est.domain is d


@pytest.mark.parametrize("seed", [12, 13])
def test_raising_the_degree_changes_nothing_that_matters_inside(seed):
    # Truncation check for the ball default: the same data (truth with degrees up to 40) fitted
    # with the default degree and with 8 more degrees (1.7x the columns). Interior means may
    # move by < 0.05 posterior sd and sds by < 3 %; shifts of that size change the coverage of a
    # 90 % interval by under 1 percentage point (normal arithmetic). Measured for seeds 12-15:
    # <= 0.018 sd and <= 1.7 %.
    rng = np.random.default_rng(seed)
    d = make_domain(1.0, kind="ball", s=2.0)
    big = d.with_modes(d.n_modes + 8)
    P, _ = _shell_problem(rng)
    sigma = 0.05
    truth = d.with_modes(40)
    c = truth_coef(rng, truth)
    y = truth.design(P) @ c + sigma * rng.standard_normal(len(P))
    x = random_interior(rng, 40, 0.8)
    out = []
    for dom in (d, big):
        prob = LinearProblem(dom.design(P), y, np.full(len(y), sigma), dom.degrees,
                             dom.eigenvalues, dom)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            out.append(Tikhonov("evidence", min_residual_dof=0).fit(prob).at(x))
    a, b = out
    assert np.max(np.abs(a.mean - b.mean) / b.sd) < 0.05
    assert np.abs(a.sd / b.sd - 1).max() < 0.03


def test_fit_one_call_with_kind_ball():
    # workflow.fit reads x, y, z with kind="ball"; the centre value of data x^2 - y^2 + 10 on a
    # dense shell is 10 (mean-value property), within the posterior interval.
    import pandas as pd

    u = fibonacci_sphere(200)
    df = pd.DataFrame({"x": u[:, 0], "y": u[:, 1], "z": u[:, 2],
                       "value": 10 + u[:, 0] ** 2 - u[:, 1] ** 2, "sigma": 0.01})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = fit(df, kind="ball")
    s = est.at([[0.0, 0.0, 0.0]])
    assert abs(s.mean[0] - 10) < 3 * s.sd[0] + 1e-3
    b = est.boundary(360)
    assert list(b.columns) == ["lat_deg", "lon_deg", "mean", "sd", "lower", "upper"]


def _calibration(seed, n_problems, rule_options):
    rng = np.random.default_rng(seed)
    d = make_domain(1.0, kind="ball", s=2.0)
    truth = d.with_modes(d.n_modes + 4)  # truth carries degrees beyond the truncation
    hits = []
    for _ in range(n_problems):
        P, cap = _shell_problem(rng, n=int(rng.integers(30, 50)))
        sigma = rng.choice([0.02, 0.05, 0.1])
        c = truth_coef(rng, truth)
        y = truth.design(P) @ c + sigma * rng.standard_normal(len(P))
        prob = LinearProblem(d.design(P), y, np.full(len(y), sigma), d.degrees, d.eigenvalues,
                             d)
        # 6 interior points and 4 surface points inside the missing cap
        u = rng.standard_normal((4, 3))
        u -= (u @ cap)[:, None] * cap
        u /= np.linalg.norm(u, axis=1)[:, None]
        ang = rng.uniform(0, 0.6, (4, 1))
        test = np.vstack([random_interior(rng, 6, 0.9), cap * np.cos(ang) + u * np.sin(ang)])
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            s = Tikhonov("evidence", **rule_options).fit(prob).at(test, 0.9)
        t = truth.design(test) @ c
        hits.append((s.lower <= t) & (t <= s.upper))
    return np.mean(hits)


@pytest.mark.slow
def test_calibration_evidence_known_sigma():
    # Seeded simulation, truth from the prior (s = 2, degrees up to L + 4), 120 problems x 10
    # points, 90 % intervals. Points within a problem are correlated, so the binomial band for
    # 1200 independent points (+-1.7 %) is too narrow; the 85-95 % band is used.
    # min_residual_dof=0: with known sigma the evidence rule needs no residual dof (see the
    # xfail test below for the default guard).
    cover = _calibration(2026, 120, {"min_residual_dof": 0})
    assert 0.85 <= cover <= 0.95, cover


@pytest.mark.slow
def test_calibration_default_settings():
    # The default Tikhonov settings (evidence rule, no residual-dof guard when sigma is given)
    # cover 85-95 % on the ball too (a guard here once forced over-smoothing: ~70 %).
    cover = _calibration(2027, 60, {})
    assert 0.85 <= cover <= 0.95, cover


def test_gaussian_stage_runs_unchanged_on_the_ball():
    # The closed-form stage sees only the linear problem. With s and tau fixed and sigma known
    # its posterior must be the textbook one (Bishop 2006 §3.3, information form
    # Sigma = (Sigma_p^-1 + G' Sigma_e^-1 G)^-1, mean = Sigma G' Sigma_e^-1 y), computed here
    # directly; field mean and sd at interior points agree to 1e-6 relative (the broad prior on
    # the mean level makes the information matrix span ~1e12, costing ~6 digits).
    from invert import GaussianPosterior

    rng = np.random.default_rng(14)
    d = make_domain(1.0, kind="ball", s=2.0)
    P, _ = _shell_problem(rng)
    sigma = 0.05
    c = truth_coef(rng, d)
    y = d.design(P) @ c + sigma * rng.standard_normal(len(P))
    G = d.design(P)
    prob = LinearProblem(G, y, np.full(len(y), sigma), d.degrees, d.eigenvalues, d, points=P)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est = GaussianPosterior(s=2.0, tau=0.7).fit(prob)
    assert est.domain.kind == "ball" and est.mean.size == d.n_coef
    v = SmoothnessPrior(s=2.0, tau=0.7).variances(d.eigenvalues, d.degrees)
    A = np.diag(1 / v) + G.T @ G / sigma**2
    cov = np.linalg.inv(A)
    mean = cov @ (G.T @ y / sigma**2)
    x = random_interior(rng, 20, 0.9)
    H = d.design(x)
    s = est.at(x)
    np.testing.assert_allclose(s.mean, H @ mean, rtol=1e-6)
    np.testing.assert_allclose(s.sd, np.sqrt(np.einsum("ij,jk,ik->i", H, cov, H)), rtol=1e-6)
