r"""Radial profiles of the annulus basis and their integrals over the wall (NumPy only).

:func:`radial_profiles` gives the value and slope of :math:`\sinh(ns)/\sinh(nL)` with
:math:`s = \ln(r/a)`, :math:`L = \ln(b/a)` (the annulus's outer-rim profile; the inner one is
the same with :math:`t = \ln(b/r)`), and :func:`wall_mean_square_blocks` the wall means of their
products that the region-mean matrix of :class:`~invert.geometry.annulus.Annulus` is made of.
See :mod:`invert.geometry.annulus` for the basis and its references.
"""

from __future__ import annotations

import numpy as np

__all__ = ["radial_profiles", "wall_mean_square_blocks"]


def radial_profiles(s, t, L, n_modes):
    r"""Radial profiles :math:`\sinh(ns)/\sinh(nL)` and their derivatives in :math:`s`.

    Parameters
    ----------
    s, t : ndarray of shape (m,)
        :math:`s = \ln(r/a) \ge 0` and :math:`t = \ln(b/r) \ge 0` with :math:`s + t = L`.
    L : float
        :math:`\ln(b/a) > 0`.
    n_modes : int

    Returns
    -------
    value, slope : ndarray of shape (m, n_modes + 1)
        ``value[:, n]`` is :math:`\sinh(ns)/\sinh(nL)` (:math:`s/L` at :math:`n = 0`) and
        ``slope[:, n]`` its derivative in :math:`s`, :math:`n\cosh(ns)/\sinh(nL)`
        (:math:`1/L` at :math:`n = 0`).

    Notes
    -----
    :math:`\sinh(ns)/\sinh(nL) = e^{-nt}\,\operatorname{expm1}(-2ns)/\operatorname{expm1}(-2nL)`
    and :math:`n\cosh(ns)/\sinh(nL) = n e^{-nt}(1 + e^{-2ns})/(-\operatorname{expm1}(-2nL))`:
    no factor exceeds 1 in size except the slope's, which is at most :math:`\approx n/\tanh
    nL`.

    Examples
    --------
    >>> v, d = radial_profiles(np.array([0.0, 0.5, 1.0]), np.array([1.0, 0.5, 0.0]), 1.0, 1)
    >>> v.round(6).tolist()
    [[0.0, 0.0], [0.5, 0.443409], [1.0, 1.0]]
    """
    s = np.asarray(s, float)[:, None]
    t = np.asarray(t, float)[:, None]
    n = np.arange(1, int(n_modes) + 1, dtype=float)[None, :]
    den = np.expm1(-2.0 * n * L)
    decay = np.exp(-n * t)
    value = np.empty((s.shape[0], n.shape[1] + 1))
    slope = np.empty_like(value)
    value[:, :1], slope[:, :1] = s / L, 1.0 / L
    value[:, 1:] = decay * np.expm1(-2.0 * n * s) / den
    slope[:, 1:] = -n * decay * (1.0 + np.exp(-2.0 * n * s)) / den
    return value, slope


def wall_mean_square_blocks(alpha, L, n_modes):
    r"""Wall means of the products of the radial profiles, degree by degree.

    Parameters
    ----------
    alpha : float
        :math:`a/b`.
    L : float
        :math:`\ln(b/a)`.
    n_modes : int

    Returns
    -------
    oo, oi, ii : ndarray of shape (n_modes + 1,)
        :math:`\frac{c_n}{\pi(1-\alpha^2)}\int_\alpha^1 p\,q\,\rho\,d\rho` for
        :math:`(p, q) = (f_n, f_n), (f_n, g_n), (g_n, g_n)`, with the angular factor
        :math:`c_0 = 2\pi`, :math:`c_n = \pi` included.

    Notes
    -----
    The integrals are taken in :math:`s = \ln(r/a)` (:math:`\rho\,d\rho = \alpha^2 e^{2s}
    ds`) by 2000-point Gauss–Legendre quadrature: the steepest profile, :math:`e^{-n(L-s)}`, has
    :math:`nL \le 900` for :math:`N \le 128` and :math:`a/b \ge 10^{-3}`, well inside what
    2000 nodes integrate to rounding.
    """
    x, w = np.polynomial.legendre.leggauss(2000)
    s = 0.5 * L * (x + 1.0)
    w = 0.5 * L * w * alpha**2 * np.exp(2.0 * s)
    fo, _ = radial_profiles(s, L - s, L, n_modes)
    fi, _ = radial_profiles(L - s, s, L, n_modes)
    scale = np.where(np.arange(n_modes + 1) == 0, 2.0, 1.0) / (1.0 - alpha**2)
    return tuple(scale * ((p * q) * w[:, None]).sum(axis=0)
                 for p, q in ((fo, fo), (fo, fi), (fi, fi)))
