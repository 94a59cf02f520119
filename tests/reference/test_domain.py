"""Disk domain: forward model against closed forms (each check names its source)."""

import numpy as np
import pytest
from scipy import integrate

from invert import Disk, DomainError, arc_harmonic_measure, poisson_kernel
from invert.geometry.disk import arc_fourier_coefficients


def test_kernel_series_matches_closed_form(rng):
    # Series (1/2pi)(1 + 2 sum rho^n cos n(theta-phi)) vs closed form (Evans, PDE, 2.2.4;
    # MathWorld "Poisson Kernel"): the domain's basis evaluated on the Fourier coefficients of
    # a point mass at phi is the series. 1e-12: the tail rho^400 < 1e-18 for rho <= 0.9.
    d = Disk(2.0, (0.3, -0.1), 400)
    for _ in range(5):
        r, th, phi = rng.uniform(0, 1.8), rng.uniform(-np.pi, np.pi), rng.uniform(0, 2 * np.pi)
        n = np.arange(1, 401)
        c = np.zeros(d.n_coef)
        c[0] = 1 / (2 * np.pi)
        c[1::2] = np.cos(n * phi) / np.pi
        c[2::2] = np.sin(n * phi) / np.pi
        pt = d.from_polar(r / 2.0, th)
        assert d.field(c, pt)[0] == pytest.approx(poisson_kernel(r, th, phi, 2.0), abs=1e-12)
        assert (d.design(pt) @ c)[0] == pytest.approx(poisson_kernel(r, th, phi, 2.0), abs=1e-12)


@pytest.mark.parametrize("R", [1.0, 2.0, 3.0])
def test_kernel_integrates_to_one(R):
    # Integral of the Poisson kernel over the rim is 1 (Evans 2.2.4), by scipy.integrate.quad.
    for r, th in [(0.0, 0.0), (0.5 * R, 1.0), (0.95 * R, -2.0)]:
        val, _ = integrate.quad(lambda p: poisson_kernel(r, th, p, R), 0, 2 * np.pi, limit=200)
        assert val == pytest.approx(1.0, abs=1e-10)


def test_mean_value_property(rng):
    # u(centre) equals the mean of the rim values (mean-value property, Evans 2.2.2).
    d = Disk(1.5, (1.0, 2.0), 20)
    c = rng.standard_normal(d.n_coef)
    pts, _ = d.rim_grid(720)
    assert d.field(c, [[1.0, 2.0]])[0] == pytest.approx(d.field(c, pts).mean(), abs=1e-12)


def test_re_zn_and_x2_minus_y2():
    # Rim data cos(k theta) gives rho^k cos(k theta) inside; x^2 - y^2 = Re z^2 (closed forms).
    d = Disk(2.0, (0.0, 0.0), 8)
    pts = d.from_polar([0.3, 0.7, 0.9], [0.2, 1.9, -2.5])
    for k in range(1, 6):
        c = np.zeros(d.n_coef)
        c[2 * k - 1] = 1.0
        rho, th = d.to_polar(pts)
        np.testing.assert_allclose(d.field(c, pts), rho**k * np.cos(k * th), atol=1e-14)
    c = np.zeros(d.n_coef)
    c[3] = 4.0  # R^2 * rho^2 cos 2 theta with R = 2
    np.testing.assert_allclose(d.field(c, pts), pts[:, 0] ** 2 - pts[:, 1] ** 2, atol=1e-13)


def test_cos_squared_check_value():
    # Rim data cos^2 phi gives u = 1/2 + (r^2/2) cos 2 theta; 0.625407207682490 at r=0.6,
    # theta=0.4 (closed form; reproduced by scipy quadrature).
    d = Disk(1.0, (0, 0), 4)
    th = np.arange(64) * 2 * np.pi / 64
    c = d.rim_coefficients(np.cos(th) ** 2)
    assert d.field(c, d.from_polar(0.6, 0.4))[0] == pytest.approx(0.625407207682490, abs=1e-14)


def test_log_of_distance_to_outside_point(rng):
    # log|z - z0| is harmonic in the disk when |z0| > R; its rim series converges like
    # (R/|z0|)^n, so 64 modes reach 1e-15 for |z0| = 2R (closed form, any complex-analysis text).
    d = Disk(1.0, (0, 0), 64)
    z0 = 2.0 * np.exp(0.7j)
    th = np.arange(1024) * 2 * np.pi / 1024
    c = d.rim_coefficients(np.log(np.abs(np.exp(1j * th) - z0)))
    pts = d.from_polar(rng.uniform(0, 1, 20), rng.uniform(0, 2 * np.pi, 20))
    z = pts[:, 0] + 1j * pts[:, 1]
    np.testing.assert_allclose(d.field(c, pts), np.log(np.abs(z - z0)), atol=1e-12)


@pytest.mark.parametrize(
    "alpha,beta,z,expected",
    [  # closed-form harmonic measure (Garnett & Marshall 2005, ch. I; by scipy quadrature)
        (0, np.pi / 2, 0.0, 0.25),
        (0, np.pi / 2, 0.5 * np.exp(1j * np.pi / 4), 0.568611667367831),
        (-np.pi / 2, np.pi / 2, 0.5, 0.795167235300867),
        (-np.pi / 2, np.pi / 2, -0.5, 0.204832764699133),
        (-0.3, 2.5, 0.8j, 0.904533424115170),
        (-0.2, 0.2, 0.9, 0.692447592041535),
    ],
)
def test_arc_harmonic_measure_check_values(alpha, beta, z, expected):
    assert arc_harmonic_measure(z, alpha, beta) == pytest.approx(expected, abs=1e-12)
    # and against quadrature of the kernel over the arc
    r, th = abs(z), np.angle(z)
    q, _ = integrate.quad(lambda p: poisson_kernel(r, th, p), alpha, beta, limit=200)
    assert q == pytest.approx(expected, abs=1e-9)


def test_step_boundary_on_arc_forward():
    # Arc indicator rim data: the truncated Fourier series evaluated inside matches the harmonic
    # measure of the arc and the half-disk formula 1/2 + (2/pi) arctan x (Garnett & Marshall 2005,
    # ch. I).
    d = Disk(1.0, (0, 0), 400)
    c = arc_fourier_coefficients(-np.pi / 2, np.pi / 2, 400)
    xs = np.linspace(-0.8, 0.8, 9)
    pts = np.c_[xs, np.zeros_like(xs)]
    np.testing.assert_allclose(d.field(c, pts), 0.5 + 2 / np.pi * np.arctan(xs), atol=1e-12)
    c = arc_fourier_coefficients(-0.3, 2.5, 400)
    pts = d.from_polar([0.2, 0.5, 0.8], [0.1, 1.0, 3.0])
    z = pts[:, 0] + 1j * pts[:, 1]
    np.testing.assert_allclose(d.field(c, pts), arc_harmonic_measure(z, -0.3, 2.5), atol=1e-12)


def test_symmetric_arc_formula():
    # |phi| < a at (r, theta): [arctan(k tan((theta+a)/2)) - arctan(k tan((theta-a)/2))]/pi,
    # k = (1+r)/(1-r); 0.549561017078302 at a=0.8, (0.5, 0.3) (Garnett & Marshall 2005, ch. I).
    a, r, th = 0.8, 0.5, 0.3
    k = (1 + r) / (1 - r)
    val = (np.arctan(k * np.tan((th + a) / 2)) - np.arctan(k * np.tan((th - a) / 2))) / np.pi
    assert val == pytest.approx(0.549561017078302, abs=1e-12)
    assert arc_harmonic_measure(r * np.exp(1j * th), -a, a) == pytest.approx(val, abs=1e-12)


def test_horner_equals_design(rng):
    d = Disk(0.7, (0.1, 0.2), 64)
    c = rng.standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    pts = d.from_polar(rng.uniform(0, 1, 300), rng.uniform(0, 2 * np.pi, 300))
    np.testing.assert_allclose(d.field(c, pts), d.design(pts) @ c, atol=1e-12)


def test_gradient_and_conjugate(rng):
    # Gradient against central finite differences; harmonic conjugate satisfies Cauchy-Riemann
    # u_x = v_y, u_y = -v_x (closed form); rim normal derivative = gradient . r_hat.
    d = Disk(1.3, (0.2, -0.4), 12)
    c = rng.standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    pts = d.from_polar(rng.uniform(0, 0.9, 10), rng.uniform(0, 2 * np.pi, 10))
    h = 1e-6
    ex, ey = np.array([h, 0]), np.array([0, h])
    ux = (d.field(c, pts + ex) - d.field(c, pts - ex)) / (2 * h)
    uy = (d.field(c, pts + ey) - d.field(c, pts - ey)) / (2 * h)
    g = d.gradient(c, pts)
    np.testing.assert_allclose(g, np.c_[ux, uy], atol=1e-7)  # FD error ~ h^2 * u''' + 1e-10/h
    vx = (d.conjugate(c, pts + ex) - d.conjugate(c, pts - ex)) / (2 * h)
    vy = (d.conjugate(c, pts + ey) - d.conjugate(c, pts - ey)) / (2 * h)
    np.testing.assert_allclose(ux, vy, atol=1e-7)
    np.testing.assert_allclose(uy, -vx, atol=1e-7)
    np.testing.assert_allclose(np.einsum("pij,j->pi", d.design_gradient(pts), c), g, atol=1e-12)
    th = np.array([0.3, 2.0])
    rim = d.from_polar(1.0, th)
    dn = (g_rim := d.gradient(c, rim))[:, 0] * np.cos(th) + g_rim[:, 1] * np.sin(th)
    np.testing.assert_allclose(d.design_normal_derivative(rim) @ c, dn, atol=1e-12)


def test_points_outside_and_snapping():
    d = Disk(1.0, (0, 0), 3)
    with pytest.raises(DomainError, match="outside the disk") as exc:
        d.design([[0.0, 0.0], [1.01, 0.0]])
    assert exc.value.index == 1
    w, on_rim, n = d.locate([[1.0005, 0.0], [0.99995, 0.0], [0.5, 0.0]])
    assert n == 1 and on_rim.tolist() == [True, True, False] and abs(w[0]) == 1.0

