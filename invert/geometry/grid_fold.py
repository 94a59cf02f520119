r"""Folding a tensor grid onto canonical points under the eight symmetries of the square.

A grid point with relative coordinates :math:`(u, v)` is the image :math:`g\,w` of the
canonical point :math:`w = \xi + i\eta`, :math:`\xi = \max(|u|, |v|)`,
:math:`\eta = \min(|u|, |v|)`, under one of :math:`w \mapsto i^k w` or :math:`w \mapsto
i^k\bar w`, :math:`k = 0..3`: without a swap (:math:`|u| \ge |v|`) the signs of :math:`u, v`
give :math:`w, \bar w, -\bar w, -w`; with a swap :math:`i\bar w, iw, -iw, -i\bar w`
(:math:`i\bar w = \eta + i\xi`). :func:`image_maps` gives the matching signed permutations of
the disk's design row. Used by :mod:`invert.geometry.cartesian`; NumPy only.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["GridFold", "fold_grid", "image_maps"]

#: Eight images, indexed [swap, u < 0, v < 0]: 0..3 are i^k w, 4..7 are i^k conj(w).
_IMAGE_OF = np.array([[[0, 4], [6, 2]], [[5, 3], [1, 7]]], dtype=np.int8)


@dataclass(frozen=True)
class GridFold:
    r"""Grid points mapped onto canonical points ``xi >= eta >= 0`` and one of eight images.

    Attributes
    ----------
    inside : ndarray of bool, shape (n_y, n_x)
        Points evaluated (the others are NaN in the maps).
    index : ndarray of int, shape (n_y, n_x)
        ``image * n_pairs + pair`` for an inside point (images ``0..3``: :math:`i^k w`,
        ``4..7``: :math:`i^k \bar w`), ``8 * n_pairs`` (a NaN entry) outside.
    w : ndarray of complex, shape (n_pairs,)
        Canonical points :math:`\xi + i\eta` in relative coordinates, by increasing radius.
    """

    inside: np.ndarray
    index: np.ndarray
    w: np.ndarray

    @property
    def sharing(self) -> float:
        """Average number of grid points per canonical point."""
        return np.count_nonzero(self.inside) / max(self.w.size, 1)

    def gather(self, table) -> np.ndarray:
        """Values on the grid from a flat table of length ``8 * n_pairs + 1`` (last: NaN)."""
        return table[self.index]


def _classes(values, tol):
    # Sorted distinct values, merging neighbours closer than tol (rounding of a symmetric
    # axis), and the class of each value; if a merged class is wider than 2 tol (a run of
    # close values), nothing is merged.
    order = np.argsort(values, kind="stable")
    sv = values[order]
    new = np.ones(sv.size, bool)
    new[1:] = np.diff(sv) > tol
    Z = sv[new]
    if tol > 0 and sv.size and (np.maximum.reduceat(sv, np.flatnonzero(new)) - Z).max() > 2 * tol:
        return _classes(values, 0.0)
    cls = np.empty(values.size, np.int64)
    cls[order] = np.cumsum(new) - 1
    return Z, cls


def fold_grid(u, v, inside, tol) -> GridFold:
    r"""Map the inside points of the tensor grid ``u x v`` onto canonical points.

    Parameters
    ----------
    u, v : ndarray of shape (n_x,), (n_y,)
        Grid coordinates relative to the centre, in units of the radius.
    inside : ndarray of bool, shape (n_y, n_x)
    tol : float
        Magnitudes closer than ``tol`` are taken as equal (a few units in the last place of
        the coordinates: a grid symmetric up to rounding).

    Returns
    -------
    GridFold
    """
    Z, cls = _classes(np.abs(np.concatenate([u, v])), tol)
    if (2 * Z.size) ** 2 > 2 * inside.size + 4096:
        return _fold_by_keys(u, v, inside, Z, cls)
    return _fold_by_table(u, v, inside, Z, cls, tol)


def _fold_by_table(u, v, inside, Z, cls, tol):
    # One table over (v class and sign, u class and sign) gives every grid point's entry: one
    # gather. Canonical points: the magnitude pairs present on the grid with rho <= 1 up to
    # the merging tolerance (a few extra are harmless: no grid point reads them).
    nZ, eps = Z.size, np.finfo(float).eps
    itype = np.int32 if 8 * nZ * nZ + 8 < 2**31 else np.int64
    cu, cv = cls[: u.size], cls[u.size:]
    pu, pv = np.zeros(nZ, bool), np.zeros(nZ, bool)
    pu[cu], pv[cv] = True, True
    present = (pu[:, None] & pv[None, :]) | (pv[:, None] & pu[None, :])
    near = Z[:, None] ** 2 + Z[None, :] ** 2 <= 1 + 8 * tol + 16 * eps
    hi_i, lo_i = np.nonzero(np.tril(present & near))
    hi, lo = Z[hi_i], Z[lo_i]
    order = np.argsort(hi * hi + lo * lo, kind="stable")
    n = hi_i.size
    rank = np.zeros((nZ, nZ), itype)
    rank[hi_i[order], lo_i[order]] = np.arange(n, dtype=itype)
    rank = np.tril(rank) + np.tril(rank, -1).T  # rank[a, b] of the pair (max, min)
    A = np.arange(nZ)
    swap = A[None, :] < A[:, None]  # [v class b, u class a]: a < b
    table = np.empty((nZ, 2, nZ, 2), itype)  # [v class, v < 0, u class, u < 0]
    for sv in (0, 1):
        for su in (0, 1):
            table[:, sv, :, su] = np.where(swap, itype(int(_IMAGE_OF[1, su, sv]) * n),
                                           itype(int(_IMAGE_OF[0, su, sv]) * n)) + rank
    table = table.reshape(2 * nZ, 2 * nZ)
    index = table[(2 * cv + (v < 0))[:, None], (2 * cu + (u < 0))[None, :]]
    np.putmask(index, ~inside, itype(8 * n))
    return GridFold(inside, index, (hi + 1j * lo)[order])


def _fold_by_keys(u, v, inside, Z, cls):
    # Many distinct magnitudes (a large grid without much symmetry): keys of the inside points.
    nZ = Z.size
    itype = np.int32 if 8 * nZ * nZ + 8 * inside.size < 2**31 else np.int64
    iu, iv = cls[: u.size].astype(itype)[None, :], cls[u.size:].astype(itype)[:, None]
    key = np.maximum(iu, iv) * itype(nZ) + np.minimum(iu, iv)  # hi * nZ + lo
    code = (iu < iv).view(np.uint8) << 2  # [swap, u < 0, v < 0] as three bits
    code |= ((u < 0).view(np.uint8) << 1)[None, :]
    code |= (v < 0).view(np.uint8)[:, None]
    k_in = key[inside]
    if nZ * nZ <= 4 * k_in.size + 4096:  # a table over all pairs of magnitudes
        used = np.zeros(nZ * nZ, bool)
        used[k_in] = True
        keys = np.flatnonzero(used)
    else:
        keys = np.unique(k_in)
    hi, lo = Z[keys // nZ], Z[keys % nZ]
    order = np.argsort(hi * hi + lo * lo, kind="stable")
    n = keys.size
    image = _IMAGE_OF.ravel().astype(itype) * itype(n)
    if nZ * nZ <= 4 * k_in.size + 4096:
        rank = np.zeros(nZ * nZ, itype)
        rank[keys[order]] = np.arange(n, dtype=itype)
        index = rank[key]
    else:
        rank = np.empty(n, itype)
        rank[order] = np.arange(n, dtype=itype)
        index = rank[np.searchsorted(keys, key).clip(0, n - 1)]
    del key
    index += image[code]
    np.putmask(index, ~inside, itype(8 * n))
    return GridFold(inside, index, (hi + 1j * lo)[order])




def image_maps(n_modes):
    r"""Signed permutations of the design row under the eight images.

    Returns
    -------
    src, sign : ndarray of shape (8, 2N+1)
        ``h(g w)[j] = sign[g, j] * h(w)[src[g, j]]`` for images ``g = 0..7`` (order as in
        :class:`GridFold`).

    Notes
    -----
    For :math:`z = w^n`, :math:`\operatorname{Re}(i^m z) = (x, -y, -x, y)` and
    :math:`\operatorname{Im}(i^m z) = (y, x, -y, -x)` for :math:`m = 0..3`; for :math:`\bar z`
    the imaginary part changes sign first. Here :math:`m = kn \bmod 4`.
    """
    N = int(n_modes)
    n = np.arange(1, N + 1)
    src = np.zeros((8, 2 * N + 1), np.intp)
    sign = np.ones((8, 2 * N + 1))
    a, b = 2 * n - 1, 2 * n
    # (source is the other column?, sign) of the a- and b-column, by m, direct and conjugate
    direct_a = ((0, 1), (1, -1), (0, -1), (1, 1))
    direct_b = ((0, 1), (1, 1), (0, -1), (1, -1))
    conj_a = ((0, 1), (1, 1), (0, -1), (1, -1))
    conj_b = ((0, -1), (1, 1), (0, 1), (1, -1))
    for g in range(8):
        m = (g % 4) * n % 4
        ta, tb = (direct_a, direct_b) if g < 4 else (conj_a, conj_b)
        other_a = np.array([ta[i][0] for i in m], bool)
        other_b = np.array([tb[i][0] for i in m], bool)
        src[g, a] = np.where(other_a, b, a)
        src[g, b] = np.where(other_b, a, b)
        sign[g, a] = [ta[i][1] for i in m]
        sign[g, b] = [tb[i][1] for i in m]
    return src, sign
