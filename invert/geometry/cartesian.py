r"""Exact posterior mean and variance of a disk field on Cartesian grids, shared by symmetry.

A grid ``x_i, y_j`` whose coordinates relative to the centre are symmetric (``x -> -x``,
``y -> -y``, and ``x <-> y`` when both axes hold the same values) carries each point to up to
seven others of the same radius. The eight maps form the symmetry group of the square; every
grid point is the image :math:`g\,w` of one *canonical* point :math:`w = \xi + i\eta`,
:math:`\xi \ge \eta \ge 0` (relative coordinates as a complex number), and the field's mean
and variance at all images follow from a few sums at :math:`w`.

Notes
-----
**The images.** The group is :math:`w \mapsto i^k w` and :math:`w \mapsto i^k \bar w`,
:math:`k = 0..3`. The design row at :math:`w` is :math:`h(w) = (1, \operatorname{Re} w,
\operatorname{Im} w, \ldots, \operatorname{Re} w^N, \operatorname{Im} w^N)`. Because
:math:`(i^k w)^n = i^{kn} w^n` and :math:`(i^k\bar w)^n = i^{kn}\,\overline{w^n}`, and
multiplying by :math:`i^m` or conjugating only swaps and negates real and imaginary parts,
:math:`h(g w) = S_g\,h(w)` with :math:`S_g` a signed permutation (:func:`image_maps`, used
where entries are recomputed from design rows).

**The variance as a sum over the canonical point.** With :math:`\Sigma = M` in the exponential
basis, :mod:`invert.geometry.polar` shows :math:`\operatorname{Var} u(\rho,\theta) =
\sum_{|q| \le 2N} c_q(\rho) e^{iq\theta}`, :math:`c_q(\rho) = \sum_e D_{qe}\rho^e`, where
:math:`D_{qe} \ne 0` only for :math:`e \ge |q|`, :math:`e \equiv q \pmod 2` (a pair
:math:`j + k = q` has :math:`|j| + |k| \ge |q|` of the same parity), and :math:`c_{-q} =
\overline{c_q}` (the variance is real). Writing :math:`e = q + 2m`, :math:`s = \rho^2` and
:math:`\rho^q e^{iq\theta} = w^q`,

.. math:: \operatorname{Var} u(w) = \operatorname{Re}\sum_{q=0}^{2N} G_q(s)\,w^q,\qquad
          G_q(s) = \gamma_q \sum_{m} D_{q,q+2m}\,s^m,\ \gamma_0 = 1,\ \gamma_{q>0} = 2,

a polynomial in :math:`w` whose coefficients depend on the radius only, so they are shared by
all eight images (one matrix product over the canonical points builds them). Write
:math:`G_q = \alpha_q + i\beta_q` and split :math:`q` by its residue :math:`r = q \bmod 4`:
:math:`P_r = \sum_{q \equiv r} \alpha_q w^q`, :math:`R_r = \sum_{q \equiv r} \beta_q w^q`
(sums over the powers :math:`(w^4)^k`, times :math:`w^r`). For :math:`f(z) = \operatorname{Re}\sum_q
(\alpha_q + i\beta_q) z^q`:

.. math:: f(i^k w) = \operatorname{Re}\sum_{r} i^{kr} X_r,\quad X_r = P_r + iR_r,\qquad
          f(i^k \bar w) = \operatorname{Re}\sum_{r} i^{-kr} Y_r,\quad Y_r = P_r - iR_r,

the first because :math:`(i^k w)^q = i^{kr} w^q` for :math:`q \equiv r`, the second because
:math:`\operatorname{Re} z = \operatorname{Re}\bar z` and :math:`\overline{(\alpha + i\beta)
(i^k\bar w)^q} = (\alpha - i\beta)\,i^{-kq} w^q`. With :math:`X_r = x_r + iy_r` and
:math:`\operatorname{Re}(i^m X) = x, -y, -x, y` for :math:`m = 0..3`, the four rotations are
:math:`(x_0 + x_2) \pm (x_1 + x_3)` for :math:`k = 0, 2` and :math:`(x_0 - x_2) \pm (y_3 -
y_1)` for :math:`k = 1, 3`; the reflections likewise with :math:`Y_r = x'_r + iy'_r`,
:math:`(x'_0 + x'_2) \pm (x'_1 + x'_3)` for :math:`k = 0, 2` and :math:`(x'_0 - x'_2) \pm (y'_1
- y'_3)` for :math:`k = 1, 3` (:func:`image_matrix`; in closed form in the compiled loop,
:mod:`._grid_loops`). A field :math:`h^\top c = \operatorname{Re}\sum_n (a_n - ib_n) w^n` is
the same sum with constant coefficients :math:`\alpha_n = a_n`, :math:`\beta_n = -b_n`
(:func:`field_chains`), so the mean costs one Horner-like chain in :math:`w^4` for eight grid
points. The variance costs one
table of :math:`G_q` per distinct radius (a matrix product) and :math:`16(N/2 + 1)` real
multiply-adds per canonical point, against :math:`N` complex ones per point for the mean map
by Horner's rule.

**Rounding.** The partial sums are as large as the largest variance among the eight images, so
the sum above loses :math:`\varepsilon\,\max_g \operatorname{Var}(gw)` to rounding, which is
large relative to a small variance (near a sensor) when an image lies in an unsensed gap. The
covariance is therefore split along its eigenvectors, :math:`\Sigma = L L^\top + K K^\top`
with :math:`L` the leading directions (:func:`leading_directions`): their part,
:math:`\|L^\top h(gw)\|^2`, is a sum of squares of fields, each rounded to
:math:`\varepsilon\max_g|f(gw)|`, so the square's error relative to the variance is only
:math:`\varepsilon(\max_g \operatorname{Var}/\operatorname{Var})^{1/2}`, the order of
:meth:`invert.problem.Estimate.at`'s own rounding; only the remainder
:math:`K K^\top`, whose variance is everywhere within a small factor of the smallest variance,
goes through the band sums. Images whose rounding estimate still exceeds
:data:`ROUNDING_LIMIT` are recomputed from their design rows.

References
----------
.. [1] A. Zygmund, *Trigonometric Series*, 3rd ed., Cambridge University Press, 2002, ch. X.
.. [2] N. J. Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed., SIAM, 2002,
       ch. 3-4 (rounding of sums and inner products: relative to the sum of the magnitudes).
"""

from __future__ import annotations

import numpy as np

from ._grid_loops import image_moments
from .grid_fold import GridFold, fold_grid, image_maps
from .polar import band_table

__all__ = ["GridFold", "fold_grid", "image_maps", "leading_directions", "band_chains",
           "band_parts", "field_chains", "image_matrix",
           "fold_moments", "grid_moments", "ROUNDING_LIMIT", "REST_FACTOR", "MIN_SHARING"]

#: Images whose estimated relative rounding error of the variance exceeds this are recomputed
#: from design rows (the route then matches Estimate.at to well below 1e-12 of the sd).
ROUNDING_LIMIT = 2e-13

#: Leading directions are split off until the remainder's largest variance (on a sample of
#: the grid) is at most this factor times the smallest variance there: the band sums then
#: lose about ``REST_FACTOR * eps`` of the smallest variance.
REST_FACTOR = 256.0

#: Largest number of leading directions (each is one more field evaluated with the mean).
MAX_LEADING = 12

#: The grid is folded only when each canonical point serves at least this many grid points on
#: average; below it design rows cost about as much (the caller falls back).
MIN_SHARING = 2.0

#: Canonical points per block (the block's coefficient table stays in the cache).
_BLOCK = 1024


def leading_directions(sample_rows, root, src, sign) -> int:
    r"""Count the leading covariance directions to treat as sums of squares.

    Parameters
    ----------
    sample_rows : ndarray of shape (n_sample, n_coef)
        Design rows at a sample of canonical points (their eight images are used).
    root : ndarray of shape (n_coef, n_coef)
        ``cov = root @ root.T`` with columns in ascending order of variance (``eigh``).
    src, sign : ndarray
        :func:`image_maps`.

    Returns
    -------
    int
        The smallest ``K <= MAX_LEADING`` for which the remainder (all but the last ``K``
        columns of ``root``) has its largest sampled variance within :data:`REST_FACTOR` of
        the smallest sampled variance.
    """
    rows = (sample_rows[:, src] * sign).reshape(-1, root.shape[0])  # all eight images
    F2 = (rows @ root) ** 2
    total = F2.sum(axis=1)
    floor = REST_FACTOR * total.min()
    rest = total.copy()
    for K in range(min(MAX_LEADING, root.shape[1]) + 1):
        if rest.max() <= floor:
            return K
        rest = rest - F2[:, -(K + 1)]
    return min(MAX_LEADING, root.shape[1])


def band_chains(cov, n_modes) -> np.ndarray:
    r"""Coefficients of :math:`G_q(s)` arranged for the residue-split sums.

    Returns
    -------
    ndarray of shape ((K+1) * 8, N+1), ``K = N // 2``
        Row ``(k, part, r)`` (part 0: :math:`\alpha`, 1: :math:`\beta`), column ``m``: the
        coefficient of :math:`s^m` in :math:`G_q` for :math:`q = r + 4k` (zero where
        :math:`q > 2N` or :math:`q + 2m > 2N`).
    """
    N = int(n_modes)
    D = band_table(cov, N)
    K = N // 2
    E = np.zeros((K + 1, 2, 4, N + 1))
    for q in range(2 * N + 1):
        m = np.arange((2 * N - q) // 2 + 1)
        g = (1.0 if q == 0 else 2.0) * D[q + 2 * N, q + 2 * m]
        E[q // 4, 0, q % 4, m] = g.real
        E[q // 4, 1, q % 4, m] = g.imag
    return E.reshape((K + 1) * 8, N + 1)


def band_parts(E, n_modes):
    r"""Split :func:`band_chains` by steps, dropping the zero corner.

    Steps :math:`k \ge k_0` have :math:`q \ge 4k_0`, so only :math:`m \le N - 2k_0` (the
    degree bound in the Notes): the second half of the steps needs half the powers of ``s``.

    Returns
    -------
    list of (k_lo, k_hi, E_part)
        ``E_part`` of shape (n_m, (k_hi - k_lo) * 8): coefficients of :math:`s^0 ..
        s^{n_m - 1}` (transposed, for ``S.T @ E_part``).
    """
    steps = E.shape[0] // 8
    k0 = max(1, steps // 2)
    parts = []
    for lo, hi in ((0, k0), (k0, steps)):
        if hi > lo:
            top = int(n_modes) - 2 * lo + 1
            parts.append((lo, hi, np.ascontiguousarray(E[8 * lo: 8 * hi, :top].T)))
    return parts


def field_chains(coefs, n_modes) -> np.ndarray:
    r"""Constant coefficient table of linear functionals (fields), like :func:`band_chains`.

    Parameters
    ----------
    coefs : ndarray of shape (n_coef, J)
        Coefficient vectors; the field of column ``j`` is :math:`\operatorname{Re}\sum_n
        (a_n - i b_n) w^n`, so :math:`\alpha_n = a_n`, :math:`\beta_n = -b_n`.

    Returns
    -------
    ndarray of shape (N // 4 + 1, 8 * J)
        Row ``k``, column ``(part, r, j)``: the coefficient of :math:`(w^4)^k w^r`.
    """
    N = int(n_modes)
    coefs = np.asarray(coefs, float)
    n = np.arange(N + 1)
    alpha = np.concatenate([coefs[:1], coefs[1::2]])
    beta = np.concatenate([np.zeros_like(coefs[:1]), -coefs[2::2]])
    T = np.zeros((N // 4 + 1, 2, 4, coefs.shape[1]))
    T[n // 4, 0, n % 4] = alpha
    T[n // 4, 1, n % 4] = beta
    return T.reshape(N // 4 + 1, -1)


def image_matrix() -> np.ndarray:
    r"""Return the linear map from the residue sums to the eight image values, shape (8, 16).

    Columns ``(part, r, re/im)`` are :math:`\operatorname{Re}, \operatorname{Im}` of
    :math:`P_r` (part 0) and :math:`R_r` (part 1); row ``g`` adds
    :math:`\operatorname{Re}(i^{m}X_r)`, :math:`m = kr \bmod 4`, for :math:`g = k < 4` with
    :math:`X_r = P_r + iR_r`, and :math:`\operatorname{Re}(i^{m}Y_r)`, :math:`m = -kr \bmod 4`,
    for :math:`g = 4 + k` with :math:`Y_r = P_r - iR_r` (module Notes), using
    :math:`\operatorname{Re}(i^m X) = x, -y, -x, y` for :math:`m = 0..3`.
    """
    M = np.zeros((8, 2, 4, 2))
    for g in range(8):
        k, sgn = g % 4, (1 if g < 4 else -1)
        for r in range(4):
            cx, cy = ((1, 0), (0, -1), (-1, 0), (0, 1))[(sgn * k * r) % 4]
            # Re X = Re P - sgn Im R, Im X = Im P + sgn Re R (X or Y by sgn)
            M[g, 0, r, 0] += cx
            M[g, 1, r, 1] -= sgn * cx
            M[g, 0, r, 1] += cy
            M[g, 1, r, 0] += sgn * cy
    return M.reshape(8, 16)


def _radius_powers(s, n_modes, tol):
    # Distinct values of the sorted s (neighbours within tol merged), their powers s^0..s^N
    # as rows, and the class of each s.
    new = np.ones(s.size, bool)
    new[1:] = np.diff(s) > tol
    S = np.empty((n_modes + 1, int(new.sum())))
    S[0] = 1.0
    sd = s[new]
    for m in range(1, n_modes + 1):
        np.multiply(S[m - 1], sd, out=S[m])
    return S, np.cumsum(new) - 1


def fold_moments(fold, coef, root, n_modes, design_rows):
    r"""Mean and variance tables of a folded grid, shape (8, n_pairs) each.

    Parameters
    ----------
    fold : GridFold
    coef : ndarray of shape (n_coef,)
        Coefficient mean.
    root : ndarray of shape (n_coef, n_coef)
        ``cov = root @ root.T``, columns in ascending order of variance.
    n_modes : int
    design_rows : callable
        Design rows at complex relative positions, shape (n, n_coef).

    Returns
    -------
    mean, var : ndarray of shape (8 * n_pairs + 1,)
        At image ``g`` of canonical point ``j`` (entry ``g * n_pairs + j``; the last entry is
        NaN, for points outside: :meth:`GridFold.gather`). Entries whose rounding estimate
        exceeds :data:`ROUNDING_LIMIT` are recomputed from the images' design rows.
    """
    N, eps = int(n_modes), np.finfo(float).eps
    p = 2 * N + 1
    src, sign = image_maps(N)  # for the sample and the recomputed entries
    w = fold.w
    n = w.size
    sample = design_rows(w[np.linspace(0, n - 1, min(n, 128)).astype(np.intp)])
    K = leading_directions(sample, root, src, sign)
    Tc = field_chains(np.column_stack([coef, root[:, p - K:]]), N)  # mean, leading fields
    rest = root[:, : p - K]
    parts = band_parts(band_chains(rest @ rest.T, N), N)
    mean_flat, var_flat = np.full(8 * n + 1, np.nan), np.full(8 * n + 1, np.nan)
    mean, var, size = mean_flat[:-1].reshape(8, n), var_flat[:-1].reshape(8, n), np.empty(n)
    S, group = _radius_powers(w.real**2 + w.imag**2, N, 4 * eps)  # w sorted by radius
    chains = np.ascontiguousarray(Tc)
    for start in range(0, n, _BLOCK):
        sl = slice(start, start + _BLOCK)
        g = group[sl]
        Sb = S[:, g[0]: g[-1] + 1].T
        bands = np.hstack([Sb[:, : Ep.shape[0]] @ Ep for _, _, Ep in parts])
        image_moments(w[sl], g - g[0], bands, chains, mean[:, sl], var[:, sl], size[sl])
    bad_g, bad_j = np.nonzero(8 * eps * size > ROUNDING_LIMIT * var)
    if bad_g.size:
        rows = design_rows(w[bad_j])
        rows = rows[np.arange(bad_j.size)[:, None], src[bad_g]] * sign[bad_g]
        mean[bad_g, bad_j] = rows @ coef
        A = rows @ root
        var[bad_g, bad_j] = np.einsum("ij,ij->i", A, A)
    return mean_flat, var_flat


def grid_moments(coef, root, x, y, *, center, radius, n_modes, design_rows):
    r"""Mean and variance of a disk field on the tensor grid ``x`` by ``y``, or None.

    Parameters
    ----------
    coef : ndarray of shape (n_coef,)
    root : ndarray of shape (n_coef, n_coef)
        ``cov = root @ root.T``, columns in ascending order of variance.
    x, y : ndarray of shape (n_x,), (n_y,)
        Grid axes in the frame of the points.
    center, radius, n_modes
        The disk.
    design_rows : callable
        Design rows at complex relative positions :math:`w = (z - c)/R`.

    Returns
    -------
    (mean, var, inside) or None
        Arrays of shape (n_y, n_x), row ``j`` at ``y[j]``; NaN where ``inside`` is False
        (:math:`\rho > 1`, computed as :meth:`Disk.interior_grid` does). None when the grid
        has too little symmetry (fewer than :data:`MIN_SHARING` points per canonical point).
    """
    x, y = np.asarray(x, float), np.asarray(y, float)
    cx, cy = center
    dx, dy = x - cx, y - cy
    # rho <= 1 as Disk.interior_grid computes it (hypot / R), decided by the squared distance
    # except within rounding of the rim.
    d2 = (dx * dx)[None, :] + (dy * dy)[:, None]
    r2 = radius * radius
    inside = d2 <= r2
    jj, ii = np.nonzero(np.abs(d2 - r2) <= 8 * np.finfo(float).eps * r2)
    inside[jj, ii] = np.hypot(dx[ii], dy[jj]) / radius <= 1.0
    del d2
    if not inside.any():
        return None
    u, v = dx / radius, dy / radius
    # Mirror images agree to the rounding of x - c: a few units in the last place.
    big = max(np.abs(x).max(), np.abs(y).max(), abs(cx), abs(cy))
    fold = fold_grid(u, v, inside, 4 * np.finfo(float).eps * big / radius)
    if fold.sharing < MIN_SHARING:
        return None
    mean, var = fold_moments(fold, coef, root, n_modes, design_rows)
    return fold.gather(mean), fold.gather(var), inside
