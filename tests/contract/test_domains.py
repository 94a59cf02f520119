"""The Domain contract, checked on every registered domain (invert.geometry.DOMAINS).

The suite iterates the registry at collection time, so a domain added to it later is checked
with no change here. Each check is also a plain function ``check_*(domain)`` so that a test
registering a domain of its own (tests/contract/test_toy_domain.py) runs the same checks.
Oracles outside the project: central finite differences, numpy's Gauss-Legendre rule and the
trapezoid rule on the circle (exact for trigonometric polynomials of degree below the number of
nodes).
"""

import numpy as np
import pytest

from invert.geometry import DOMAINS, Domain
from invert.prior import SmoothnessPrior

N_MODES = 6  # small truncation: every check is algebra on a few dozen columns


def make(cls, n_modes=N_MODES):
    """A domain of class ``cls`` off the origin, with a non-unit radius."""
    return cls.from_prior(1.7, tuple(0.1 * (k + 1) for k in range(cls.dim)), s=2.5,
                          n_modes=n_modes)


def inner(domain):
    """Relative radius of the domain's inner boundary (0 when the region reaches its centre)."""
    return float(getattr(domain, "inner_relative_radius", 0.0))


def wall_radius(domain, frac):
    """Relative radius ``frac`` of the way from the inner boundary (or centre) to the rim."""
    return inner(domain) + (1.0 - inner(domain)) * frac


def sample_points(domain, n, rng, rho_max=1.0):
    """``n`` points inside the domain: random directions, relative radii up to ``rho_max``.

    Uniform in volume between the inner boundary (the centre for a disk or ball) and ``rho_max``.
    """
    u = rng.standard_normal((n, domain.dim))
    u /= np.linalg.norm(u, axis=1)[:, None]
    lo, d = inner(domain), domain.dim
    rho = (lo**d + (rho_max**d - lo**d) * rng.uniform(0.0, 1.0, n)) ** (1.0 / d)
    return np.asarray(domain.center) + domain.radius * rho[:, None] * u


def rim_quadrature(domain):
    """Nodes on the rim and weights of the rim mean, exact for products of two columns.

    dim 2: trapezoid at M = 4 N + 8 equally spaced angles (exact for trigonometric polynomials
    of degree < M; products of columns have degree <= 2 N). dim 3: Gauss-Legendre in cos of the
    polar angle (N + 2 nodes, exact to degree 2 N + 3) times 2 N + 4 equally spaced azimuths.
    """
    c, R, N = np.asarray(domain.center), domain.radius, domain.n_modes
    if domain.dim == 2:
        # the domain's own rim grid: every rim (an annulus has two), equal weight per point
        pts, _ = domain.rim_grid(4 * N + 8)
        return pts, np.full(len(pts), 1 / len(pts))
    if domain.dim == 3:
        t, wt = np.polynomial.legendre.leggauss(N + 2)
        phi = 2 * np.pi * np.arange(2 * N + 4) / (2 * N + 4)
        T, P = np.meshgrid(t, phi, indexing="ij")
        s = np.sqrt(1 - T**2)
        xi = np.column_stack([(s * np.cos(P)).ravel(), (s * np.sin(P)).ravel(), T.ravel()])
        return c + R * xi, np.repeat(wt / 2, phi.size) / phi.size
    pytest.skip(f"no rim quadrature written for dim {domain.dim}")


# --- checks ----------------------------------------------------------------------------------
def check_protocol_and_declarations(domain, name):
    assert isinstance(domain, Domain)
    assert domain.kind == name
    assert len(domain.point_columns) == domain.dim
    assert all(isinstance(c, str) for c in domain.point_columns)
    names = domain.coefficient_names
    assert len(names) == domain.n_coef == len(domain.degrees) == len(domain.eigenvalues)
    assert len(set(names)) == len(names) and all(isinstance(n, str) for n in names)
    mean = np.asarray(domain.mean_columns)
    assert mean.dtype.kind == "i" and mean.size >= 1
    np.testing.assert_array_equal(mean, np.flatnonzero(np.asarray(domain.degrees) == 0))
    np.testing.assert_array_equal(np.bincount(domain.degrees),
                                  domain.degree_multiplicity(np.arange(domain.n_modes + 1)))
    np.testing.assert_array_equal(domain.eigenvalues, domain.degree_eigenvalue(domain.degrees))
    tol, max_degree = domain.truncation_rule()
    assert 0 < tol < 1 and int(max_degree) == max_degree >= 1
    assert isinstance(domain.describe(), dict)
    np.testing.assert_allclose(domain.relative_radius(np.asarray(domain.center)[None, :]), 0.0)
    assert 0.0 <= inner(domain) < 1.0
    # The model check's source direction vanishes on every rim and peaks at 1 inside
    # (algebra: rounding, 1e-12).
    rim, _ = domain.rim_grid(24)
    np.testing.assert_allclose(domain.source_field(rim), 0.0, atol=1e-12)
    inside, _ = domain.field_grid(31)
    q = domain.source_field(inside)
    assert q.min() >= -1e-12 and 0.9 < q.max() <= 1 + 1e-12
    for name, point in domain.reference_points():
        assert isinstance(name, str) and len(domain.locate(np.asarray(point)[None, :])[0]) == 1


def check_design_equals_field(domain, rng):
    # G c and field(c) are two evaluations of the same sum: algebra, rtol 1e-12 (atol for
    # values near zero, relative to the coefficient scale).
    pts = np.vstack([sample_points(domain, 40, rng), domain.rim_grid(36)[0]])
    c = rng.standard_normal(domain.n_coef)
    np.testing.assert_allclose(domain.design(pts) @ c, domain.field(c, pts), rtol=1e-12,
                               atol=1e-12)


def check_with_modes_keeps_columns(domain, rng):
    # Extending the truncation appends columns: the first n_coef are unchanged (algebra).
    pts = sample_points(domain, 30, rng)
    big = domain.with_modes(domain.n_modes + 3)
    assert type(big) is type(domain) and big.n_modes == domain.n_modes + 3
    G, Gb = domain.design(pts), big.design(pts)
    np.testing.assert_allclose(Gb[:, : domain.n_coef], G, rtol=1e-12, atol=1e-13)
    np.testing.assert_array_equal(big.degrees[: domain.n_coef], domain.degrees)


def check_grids(domain):
    for n in (36, 72):
        pts, cols = domain.rim_grid(n)
        assert pts.ndim == 2 and pts.shape[1] == domain.dim and len(pts) >= 1
        assert all(np.shape(v) == (len(pts),) for v in cols.values())
        _, on_rim, _ = domain.locate(pts)
        assert on_rim.all()
        # Rim points lie on a boundary (the outer rim, or the inner one of a domain with a
        # bore) to rounding (1e-12 of the radius).
        radii = np.array([1.0, inner(domain)] if inner(domain) > 0 else [1.0])
        rr = domain.relative_radius(pts)
        assert np.abs(rr[:, None] - radii[None, :]).min(axis=1).max() <= 1e-12
    pts, cols = domain.field_grid(15)
    assert pts.ndim == 2 and pts.shape[1] == domain.dim and len(pts) > 0
    assert tuple(cols) == tuple(domain.point_columns)
    for k, name in enumerate(domain.point_columns):
        np.testing.assert_array_equal(cols[name], pts[:, k])
    rr = domain.relative_radius(pts)
    assert np.all(rr <= 1 + 1e-12) and np.all(rr >= inner(domain) - 1e-12)
    n = domain.rim_search_size()
    assert int(n) == n and len(domain.rim_grid(n)[0]) >= domain.n_coef


def check_normal_derivative(domain, rng):
    # Central differences of field along the radial direction at rho = 0.5 and 0.999 (inside,
    # so no point is snapped onto the rim). Step h = 1e-5 R: truncation error h^2/6 |u'''|
    # with |u'''| <~ N^3 |c|_1 / R^3 (about 2e-8 here) and rounding ~1e-16 |u| / h ~ 1e-11;
    # hence atol 1e-6 on derivatives of order N |c|_1 / R.
    c = rng.standard_normal(domain.n_coef)
    u = rng.standard_normal((8, domain.dim))
    u /= np.linalg.norm(u, axis=1)[:, None]
    h = 1e-5 * domain.radius
    for rho in (wall_radius(domain, 0.5), wall_radius(domain, 0.999)):
        x = np.asarray(domain.center) + domain.radius * rho * u
        fd = (domain.field(c, x + h * u) - domain.field(c, x - h * u)) / (2 * h)
        np.testing.assert_allclose(domain.design_normal_derivative(x) @ c, fd, atol=1e-6)
    rim = np.asarray(domain.center) + domain.radius * u
    # On the rim, flux = -k du/dn (algebra against the rows), and the rows are the limit of
    # the interior ones (the field is a polynomial: continuous up to the rim).
    dn = domain.design_normal_derivative(rim) @ c
    np.testing.assert_allclose(domain.normal_flux(c, rim, conductivity=2.0), -2.0 * dn,
                               rtol=1e-12, atol=1e-12)
    inner = np.asarray(domain.center) + domain.radius * (1 - 1e-9) * u
    np.testing.assert_allclose(domain.design_normal_derivative(inner) @ c, dn, atol=1e-6)


def check_prior_point_variance(domain):
    # SmoothnessPrior.point_variance (a per-degree sum using rim_mean_square) against the rim
    # mean of the pointwise prior variance sum_j v_j h_j(x)^2 over the non-mean columns, by a
    # rule exact for these polynomials: agreement to rounding (rtol 1e-10).
    prior = SmoothnessPrior(s=2.5, tau=0.7)
    pts, w = rim_quadrature(domain)
    v = prior.variances(domain.eigenvalues, domain.degrees)
    keep = np.setdiff1d(np.arange(domain.n_coef), domain.mean_columns)
    pointwise = (domain.design(pts)[:, keep] ** 2) @ v[keep]
    assert prior.point_variance(domain, n_max=domain.n_modes) == pytest.approx(
        float(w @ pointwise), rel=1e-10)
    np.testing.assert_allclose(domain.rim_mean_square(np.arange(domain.n_modes + 1)),
                               np.bincount(domain.degrees, weights=w @ domain.design(pts) ** 2),
                               rtol=1e-10)


def check_all(domain, name, rng):
    """Every check above, for a domain registered under ``name``."""
    check_protocol_and_declarations(domain, name)
    check_design_equals_field(domain, rng)
    check_with_modes_keeps_columns(domain, rng)
    check_grids(domain)
    check_normal_derivative(domain, rng)
    check_prior_point_variance(domain)


# --- the suite over the registry ---------------------------------------------------------------
@pytest.fixture(params=list(DOMAINS))
def named(request):
    return request.param, make(DOMAINS[request.param])


def test_protocol_and_declarations(named):
    check_protocol_and_declarations(named[1], named[0])


def test_design_equals_field(named, rng):
    check_design_equals_field(named[1], rng)


def test_with_modes_keeps_first_columns(named, rng):
    check_with_modes_keeps_columns(named[1], rng)


def test_grids_on_boundary_and_inside(named):
    check_grids(named[1])


def test_normal_derivative_against_finite_differences(named, rng):
    check_normal_derivative(named[1], rng)


def test_prior_point_variance_against_quadrature(named):
    check_prior_point_variance(named[1])


def test_from_prior_uses_the_truncation_rule(named):
    # Without n_modes, the truncation keeps the omitted share of rim variance under the rule's
    # tol (invert.prior.truncation_degree), within the domain's caps.
    cls = DOMAINS[named[0]]
    d = cls.from_prior(1.0, s=3.0)
    tol, _ = d.truncation_rule()
    n = np.arange(1, 200001)
    wgt = d.degree_multiplicity(n) * (1 + d.degree_eigenvalue(n)) ** -3.0
    assert wgt[d.n_modes:].sum() / wgt.sum() <= tol or d.n_modes == cls.initial_max_degree
    with pytest.raises(ValueError, match="coordinates"):
        cls.from_prior(1.0, (0.0,) * (cls.dim + 1), s=3.0)


def test_unknown_name_is_rejected_with_the_registered_names():
    from invert.workflow import make_domain

    with pytest.raises(ValueError, match="'kind' parameter must be") as exc:
        make_domain(1.0, kind="no such domain")
    assert all(repr(name) in str(exc.value) for name in DOMAINS)
