r"""Compiled loop (numba) of the folded Cartesian maps; see :mod:`.cartesian` for the maths.

One pass over a block of canonical points: the powers of :math:`w^4`, the residue-split band
sum of the variance and the constant-coefficient sums of the mean and of the leading fields,
their products with :math:`w^r`, and the eight image values (:func:`.cartesian.image_matrix`
in closed form), with no temporary arrays per point.
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["image_moments"]


@numba.njit(cache=True, fastmath={"contract"})
def image_moments(w, group, bands, chains, mean, var, size):  # pragma: no cover
    r"""Fill the mean and variance of the eight images of each canonical point.

    Parameters
    ----------
    w : ndarray of complex, shape (n,)
        Canonical points.
    group : ndarray of int, shape (n,)
        Row of ``bands`` (the radius class) of each point.
    bands : ndarray of shape (n_radii, steps * 8)
        Column ``k * 8 + part * 4 + r``: the coefficient of :math:`(w^4)^k w^r` in the band
        sum (part 0: :math:`\alpha`, 1: :math:`\beta`) at the point's radius.
    chains : ndarray of shape (n_chain, 8 * J)
        Column ``(part * 4 + r) * J + j``: the coefficient of :math:`(w^4)^k w^r` (row ``k``)
        of the mean (``j = 0``) and of the leading fields (``j >= 1``).
    mean, var : ndarray of shape (8, n)
        Filled: image ``g`` of point ``j`` (the mean; the band sum plus the squares of the
        leading fields).
    size : ndarray of shape (n,)
        Filled: the rounding scale of the band sum, :math:`2\sum_r |P_r| + |R_r|` (absolute
        real and imaginary parts), a bound on :math:`\sum_r |X_r| + |Y_r|`.
    """
    n = w.size
    steps = bands.shape[1] // 8
    n_chain = chains.shape[0]
    J = chains.shape[1] // 8
    Xr = np.empty((J + 1, 8))
    Xi = np.empty((J + 1, 8))
    F = np.empty((8, J + 1))
    for j in range(n):
        wr, wi = w[j].real, w[j].imag
        w2r, w2i = wr * wr - wi * wi, 2.0 * wr * wi
        w3r, w3i = w2r * wr - w2i * wi, w2r * wi + w2i * wr
        w4r, w4i = w2r * w2r - w2i * w2i, 2.0 * w2r * w2i
        gi = group[j]
        Xr[:] = 0.0
        Xi[:] = 0.0
        pr, pi = 1.0, 0.0
        for k in range(steps):
            for row in range(8):
                c = bands[gi, k * 8 + row]
                Xr[0, row] += c * pr
                Xi[0, row] += c * pi
            pr, pi = pr * w4r - pi * w4i, pr * w4i + pi * w4r
        pr, pi = 1.0, 0.0
        for k in range(n_chain):
            for row in range(8):
                for q in range(J):
                    c = chains[k, row * J + q]
                    Xr[1 + q, row] += c * pr
                    Xi[1 + q, row] += c * pi
            pr, pi = pr * w4r - pi * w4i, pr * w4i + pi * w4r
        for q in range(J + 1):
            for part in range(2):
                i = part * 4
                _times(Xr, Xi, q, i + 1, wr, wi)
                _times(Xr, Xi, q, i + 2, w2r, w2i)
                _times(Xr, Xi, q, i + 3, w3r, w3i)
            _images(Xr, Xi, q, F)
        s = 0.0
        for row in range(8):
            s += abs(Xr[0, row]) + abs(Xi[0, row])
        size[j] = 2.0 * s
        for g in range(8):
            v = F[g, 0]
            for q in range(2, J + 1):
                v += F[g, q] * F[g, q]
            var[g, j] = v
            mean[g, j] = F[g, 1]


@numba.njit(cache=True, inline="always", fastmath={"contract"})
def _times(Xr, Xi, q, i, ar, ai):  # pragma: no cover
    xr, xi = Xr[q, i], Xi[q, i]
    Xr[q, i] = xr * ar - xi * ai
    Xi[q, i] = xr * ai + xi * ar


@numba.njit(cache=True, inline="always", fastmath={"contract"})
def _images(Xr, Xi, q, F):  # pragma: no cover
    # The eight image values of sum q: with P_r = X[q, r], R_r = X[q, 4 + r], the rotations
    # i^k w take Re sum_r i^(kr) (P_r + i R_r), the reflections i^k conj(w) take
    # Re sum_r i^(-kr) (P_r - i R_r); Re(i^m (x + iy)) = x, -y, -x, y for m = 0..3.
    x0, x1 = Xr[q, 0] - Xi[q, 4], Xr[q, 1] - Xi[q, 5]
    x2, x3 = Xr[q, 2] - Xi[q, 6], Xr[q, 3] - Xi[q, 7]
    y1, y3 = Xi[q, 1] + Xr[q, 5], Xi[q, 3] + Xr[q, 7]
    u0, u1 = Xr[q, 0] + Xi[q, 4], Xr[q, 1] + Xi[q, 5]
    u2, u3 = Xr[q, 2] + Xi[q, 6], Xr[q, 3] + Xi[q, 7]
    v1, v3 = Xi[q, 1] - Xr[q, 5], Xi[q, 3] - Xr[q, 7]
    F[0, q] = (x0 + x2) + (x1 + x3)
    F[2, q] = (x0 + x2) - (x1 + x3)
    F[1, q] = (x0 - x2) + (y3 - y1)
    F[3, q] = (x0 - x2) - (y3 - y1)
    F[4, q] = (u0 + u2) + (u1 + u3)
    F[6, q] = (u0 + u2) - (u1 + u3)
    F[5, q] = (u0 - u2) + (v1 - v3)
    F[7, q] = (u0 - u2) - (v1 - v3)
