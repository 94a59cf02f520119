"""Cartesian sd maps (Estimate.grid_map) against design rows and a dense extended-precision sum.

References (outside the folded route):
- ``Estimate.at``: blocked design rows and row sums of (H R)^2, an independent computation;
- sqrt(diag(H Sigma H^T)) with H built from the definition Re w^n, Im w^n (numpy complex
  powers) and summed in np.longdouble, so its own rounding is far below the tolerances;
- ``Disk.field`` (Horner's rule) for the mean.
Tolerances: 1e-12 relative on the sd, because Estimate.at itself rounds to ~3e-13 of the sd
on these problems (sd varying 80-fold, see test_fast_maps.py) and the folded route is held to
~1e-13 by its rounding check; 1e-12 absolute on the mean (fields of order 1, sums of <= 65
terms of size <= 1 in either route).
"""

import numpy as np
import pytest

from invert import Disk, Estimate, LinearProblem, Tikhonov
from invert.geometry import cartesian


def gap_fit(n_modes, center=(0.0, 0.0), radius=1.0, seed=0):
    # 20 rim sensors with a 4-sensor gap (SYNTHETIC): the sd varies about 80-fold.
    d = Disk(radius, center, n_modes)
    c = np.random.default_rng(seed).standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    sp = d.from_polar(1.0, np.linspace(0, 2 * np.pi, 24, endpoint=False)[4:])
    prob = LinearProblem(d.design(sp), d.design(sp) @ c, np.full(len(sp), 0.05), d.degrees,
                         d.eigenvalues, d)
    return Tikhonov("fixed", lam=0.05**2).fit(prob)


def grid_points(x, y):
    X, Y = np.meshgrid(x, y)
    return np.column_stack([X.ravel(), Y.ravel()])


def dense_sd(est, pts):
    d = est.domain
    w = ((pts[:, 0] - d.center[0]) + 1j * (pts[:, 1] - d.center[1])) / d.radius
    cols = [np.ones(len(w))]
    for n in range(1, d.n_modes + 1):
        cols += [(w**n).real, (w**n).imag]
    H = np.column_stack(cols).astype(np.longdouble)
    S = est.cov.astype(np.longdouble)
    return np.sqrt(np.einsum("ij,jk,ik->i", H, S, H)).astype(float)


def check_against_at(est, x, y, level=0.9, predictive=False):
    got = est.grid_map(x, y, level, predictive=predictive)
    pts = grid_points(x, y)
    inside = est.domain.relative_radius(pts) <= 1.0
    assert got.sd.shape == (len(y), len(x))
    # Outside the disk: NaN in every map.
    assert np.isnan(got.sd.ravel()[~inside]).all() and np.isnan(got.mean.ravel()[~inside]).all()
    ref = est.at(pts[inside], level, predictive=predictive)
    np.testing.assert_allclose(got.sd.ravel()[inside], ref.sd, rtol=1e-12)
    np.testing.assert_allclose(got.mean.ravel()[inside], ref.mean, rtol=0, atol=1e-12)
    np.testing.assert_allclose(got.upper.ravel()[inside] - got.lower.ravel()[inside],
                               ref.upper - ref.lower, rtol=1e-12)
    return got, pts, inside


@pytest.mark.parametrize("n_modes", [22, 64])
@pytest.mark.parametrize("n", [61, 60])
def test_symmetric_grids_equal_design_rows(n_modes, n):
    est = gap_fit(n_modes)
    xs, ys, _, _ = est.domain.interior_grid(n)
    got, pts, inside = check_against_at(est, xs, ys)
    # The extended-precision dense sum, and the mean against Horner's rule.
    np.testing.assert_allclose(got.sd.ravel()[inside], dense_sd(est, pts[inside]), rtol=1e-12)
    np.testing.assert_allclose(got.mean.ravel()[inside],
                               est.domain.field(est.mean, pts[inside]), rtol=0, atol=1e-12)


def test_off_centre_disk_and_unequal_axes():
    # Centre (3.7, -1.2), radius 0.25: x and y hold different values (no x <-> y sharing).
    est = gap_fit(22, center=(3.7, -1.2), radius=0.25, seed=1)
    xs = 3.7 + 0.25 * np.linspace(-1, 1, 41)
    ys = -1.2 + 0.25 * np.linspace(-1, 1, 57)
    check_against_at(est, xs, ys)
    xs, ys, _, _ = est.domain.interior_grid(81)
    check_against_at(est, xs, ys)


def test_partly_symmetric_and_asymmetric_grids(rng):
    est = gap_fit(64)
    # Only the part |x| <= 0.3 of this axis has mirror images.
    check_against_at(est, np.linspace(-0.3, 1.0, 53), np.linspace(-1, 1, 49))
    # No symmetry at all: the domain declines (None) and design rows are used.
    x, y = np.sort(rng.uniform(-1, 1, 37)), np.sort(rng.uniform(-1, 1, 29))
    assert est.domain.grid_moments(est.mean, est._root, x, y) is None
    check_against_at(est, x, y)


def test_student_t_and_predictive():
    est = gap_fit(22)
    t = Estimate(est.mean, est.cov, domain=est.domain, df=5.0, noise_sd=0.05)
    xs, ys, _, _ = t.domain.interior_grid(45)
    check_against_at(t, xs, ys, level=0.8)
    check_against_at(t, xs, ys, predictive=True)


def test_draws_estimate_falls_back_to_at(rng):
    est = gap_fit(22)
    draws = est.sample(200, rng=rng)
    e = Estimate(draws.mean(axis=0), draws=draws, domain=est.domain)
    xs, ys, _, _ = e.domain.interior_grid(31)
    got = e.grid_map(xs, ys)
    pts = grid_points(xs, ys)
    inside = e.domain.relative_radius(pts) <= 1.0
    ref = e.at(pts[inside])  # the same draws: identical quantiles
    np.testing.assert_array_equal(got.lower.ravel()[inside], ref.lower)
    np.testing.assert_array_equal(got.sd.ravel()[inside], ref.sd)
    assert np.isnan(got.sd.ravel()[~inside]).all()


def test_rounding_check_recomputes_entries(monkeypatch):
    # No leading directions split off (all variance through the band sums): the rounding
    # check must catch the entries near sensors whose images lie in the gap.
    est = gap_fit(64)
    xs, ys, _, _ = est.domain.interior_grid(61)
    monkeypatch.setattr(cartesian, "REST_FACTOR", 1e300)
    check_against_at(est, xs, ys)
    # Every entry recomputed from design rows gives the same map.
    monkeypatch.setattr(cartesian, "ROUNDING_LIMIT", 0.0)
    check_against_at(est, xs, ys)


@pytest.mark.parametrize("n_modes", [0, 1, 2, 3, 5])
def test_few_harmonics(n_modes):
    est = gap_fit(n_modes)
    xs, ys, _, _ = est.domain.interior_grid(21)
    check_against_at(est, xs, ys)


def test_image_maps_permute_design_rows(rng):
    # h(g w) = sign * h(w)[src] for the eight images, against the design at g w.
    d = Disk(1.0, (0.0, 0.0), 13)
    w = np.sqrt(rng.random(50)) * np.exp(1j * rng.uniform(0, 2 * np.pi, 50))
    src, sign = cartesian.image_maps(d.n_modes)
    images = [w, 1j * w, -w, -1j * w, w.conj(), 1j * w.conj(), -w.conj(), -1j * w.conj()]
    H = d.design(np.column_stack([w.real, w.imag]))
    for g, z in enumerate(images):
        Hg = d.design(np.column_stack([z.real, z.imag]))
        np.testing.assert_allclose(Hg, H[:, src[g]] * sign[g], rtol=0, atol=1e-14)


def test_fold_maps_each_point_to_its_image():
    # Applying image g to the canonical point gives the grid point back (to rounding).
    x = np.linspace(-1, 1, 40)
    y = np.linspace(-0.5, 1, 31)
    inside = np.hypot(x[None, :], y[:, None]) <= 1
    fold = cartesian.fold_grid(x, y, inside, 1e-15)
    n = fold.w.size
    g, j = np.divmod(fold.index[inside], n)
    w = fold.w[j]
    z = np.where(g < 4, w, w.conj()) * 1j ** (g % 4)
    X, Y = np.meshgrid(x, y)
    np.testing.assert_allclose(z, X[inside] + 1j * Y[inside], rtol=0, atol=1e-15)
    assert (fold.index[~inside] == 8 * n).all()
    assert fold.w.real.min() >= 0 and (fold.w.real >= fold.w.imag).all()


def test_bad_axes_and_level():
    est = gap_fit(3)
    with pytest.raises(ValueError, match="grid axes of Estimate.grid_map must be finite 1-D"):
        est.grid_map(np.zeros((2, 2)), np.zeros(3))
    with pytest.raises(ValueError, match="grid axes of Estimate.grid_map must be finite 1-D"):
        est.grid_map([0.0, np.nan], [0.0])
    with pytest.raises(ValueError, match="'level' parameter of Estimate.grid_map"):
        est.grid_map([0.0], [0.0], level=1.5)


@pytest.mark.filterwarnings("ignore::invert.errors.FitWarning")  # s at its range's end: fine here
def test_gaussian_stage_estimate():
    # The evidence-optimal Gaussian stage on the same gap problem (estimated hyperparameters).
    from invert import GaussianPosterior

    est = gap_fit(22)
    d = est.domain
    sp = d.from_polar(1.0, np.linspace(0, 2 * np.pi, 24, endpoint=False)[4:])
    y = d.field(est.mean, sp) + 0.05 * np.random.default_rng(3).standard_normal(len(sp))
    prob = LinearProblem(d.design(sp), y, np.full(len(sp), 0.05), d.degrees, d.eigenvalues, d)
    g = GaussianPosterior().fit(prob)
    xs, ys, _, _ = d.interior_grid(51)
    check_against_at(g, xs, ys)


def test_field_table_equals_design_rows():
    # field.csv's rows (report.files.field_summary) against Estimate.at on field_grid.
    from invert.report.files import field_summary

    est = gap_fit(22, center=(0.3, 0.1), radius=2.0)
    pts, _ = est.domain.field_grid(41)
    got = field_summary(est, 41, 0.9)
    ref = est.at(pts, 0.9)
    np.testing.assert_array_equal(got[["x", "y"]].to_numpy(), pts)
    np.testing.assert_allclose(got["sd"], ref.sd, rtol=1e-12)
    np.testing.assert_allclose(got["upper"], ref.upper, rtol=1e-12)


def test_grid_outside_the_disk():
    # No point inside: every entry NaN (the design-row route on no points).
    est = gap_fit(3)
    got = est.grid_map([2.0, 3.0], [2.0, 3.0, 4.0])
    assert got.sd.shape == (3, 2) and np.isnan(got.sd).all() and np.isnan(got.mean).all()


def test_compiled_images_equal_the_image_matrix():
    # The compiled loop's closed-form image values against image_matrix applied to the residue
    # sums (the signed-permutation derivation in cartesian's Notes), on random coefficient
    # tables: one field (J = 1) and a band sum, at random canonical points. Sums of <= 8
    # terms of size <= 10: 1e-12 absolute.
    from invert.geometry._grid_loops import image_moments
    from invert.geometry.cartesian import image_matrix

    rng = np.random.default_rng(5)
    n, steps, n_chain = 40, 3, 2
    w = rng.uniform(0, 1, n) * np.exp(1j * rng.uniform(0, np.pi / 4, n))
    bands = rng.standard_normal((n, steps * 8))
    chains = rng.standard_normal((n_chain, 8 * 2))  # the mean and one leading field
    mean, var, size = np.empty((8, n)), np.empty((8, n)), np.empty(n)
    image_moments(w, np.arange(n), bands, chains, mean, var, size)
    M = image_matrix()

    def images(coef, rows):  # coef[k, part * 4 + r] -> the eight values Re sum ... at w
        P = np.array([[sum(coef[k, part * 4 + r] * w[j] ** (4 * k + r) for k in range(rows))
                       for part in range(2) for r in range(4)] for j in range(n)])
        parts = np.stack([P.real, P.imag], axis=-1).reshape(n, 16)  # (part, r, re/im)
        return parts @ M.T

    ref_band = np.array([images(bands[j].reshape(steps, 8), steps)[j] for j in range(n)])
    field0 = images(chains.reshape(n_chain, 8, 2)[:, :, 0], n_chain)
    field1 = images(chains.reshape(n_chain, 8, 2)[:, :, 1], n_chain)
    np.testing.assert_allclose(mean, field0.T, rtol=0, atol=1e-12)
    np.testing.assert_allclose(var, (ref_band + field1**2).T, rtol=0, atol=1e-12)
