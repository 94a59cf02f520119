r"""Spherical functions for the ball: real spherical harmonics and the Poisson kernels.

Pure functions (arrays in, arrays out) used by :class:`~invert.geometry.ball.Ball` and re-exported
from :mod:`invert.geometry.ball`. Conventions (real harmonics from
:func:`scipy.special.sph_harm_y`, Condon–Shortley phase) are in the notes of that module.

References
----------
.. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., AMS, 2010, §2.2.4.
.. [2] NIST Digital Library of Mathematical Functions, §14.30. https://dlmf.nist.gov/14.30
"""

from __future__ import annotations

import numpy as np
from scipy import special

__all__ = ["real_sph_harm", "poisson_kernel_nd", "ball_poisson_kernel"]


def real_sph_harm(degree, order, polar, azimuth):
    r"""Real spherical harmonic :math:`Y_{\ell m}`, orthonormal on the unit sphere.

    Parameters
    ----------
    degree : int or array_like of int
        :math:`\ell \ge 0`.
    order : int or array_like of int
        :math:`m`, with :math:`|m| \le \ell` (otherwise the value is 0).
    polar : array_like
        Polar angle :math:`\vartheta \in [0, \pi]`, radians, measured from :math:`+z`.
    azimuth : array_like
        Azimuth :math:`\varphi`, radians, counter-clockwise from :math:`+x`.

    Returns
    -------
    ndarray
        Broadcast over the inputs.

    Notes
    -----
    Built from :func:`scipy.special.sph_harm_y` (``sph_harm_y(n, m, theta, phi)``: degree
    first, ``theta`` the polar angle) as
    :math:`\sqrt2(-1)^m\operatorname{Re}Y_\ell^m` for :math:`m>0`, :math:`Y_\ell^0` for
    :math:`m=0` and :math:`\sqrt2(-1)^m\operatorname{Im}Y_\ell^{|m|}` for :math:`m<0`.

    Examples
    --------
    >>> round(float(real_sph_harm(0, 0, 0.3, 1.2)), 15)
    0.282094791773878
    """
    degree, order = np.asarray(degree), np.asarray(order)
    Y = special.sph_harm_y(degree, np.abs(order), polar, azimuth)
    sign = np.where(order % 2 == 0, 1.0, -1.0)
    return np.where(order > 0, np.sqrt(2) * sign * Y.real,
                    np.where(order < 0, np.sqrt(2) * sign * Y.imag, Y.real))


def poisson_kernel_nd(x, zeta, radius=1.0):
    r"""Poisson kernel of the ball of radius ``radius`` about the origin in :math:`\mathbb R^n`.

    Parameters
    ----------
    x : array_like of shape (..., n)
        Interior points, :math:`|x| < R`.
    zeta : array_like of shape (..., n)
        Points on the sphere :math:`|\zeta| = R`; broadcast against ``x``.
    radius : float, default=1.0

    Returns
    -------
    ndarray
        :math:`P(x, \zeta)`, a density with respect to surface measure on the sphere.

    Notes
    -----
    .. math:: P(x,\zeta) = \frac{R^2 - |x|^2}{R\,\omega_{n-1}\,|x - \zeta|^n},\qquad
              \omega_{n-1} = \frac{2\pi^{n/2}}{\Gamma(n/2)},

    the area of the unit sphere in :math:`\mathbb R^n` [1]_, so that
    :math:`\oint_{|\zeta|=R} P\,dS = 1` and :math:`u(x) = \oint P(x,\zeta) f(\zeta)\,dS(\zeta)`.
    For :math:`n = 2`, :math:`\omega_1 = 2\pi` and ``R * poisson_kernel_nd`` is the disk kernel
    :func:`invert.geometry.disk.poisson_kernel` (a density in the rim angle,
    :math:`dS = R\,d\varphi`).

    References
    ----------
    .. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., §2.2.4.
    """
    x = np.asarray(x, dtype=float)
    zeta = np.asarray(zeta, dtype=float)
    n = x.shape[-1]
    R = float(radius)
    omega = 2 * np.pi ** (n / 2) / special.gamma(n / 2)
    dist = np.linalg.norm(x - zeta, axis=-1)
    return (R * R - np.sum(x * x, axis=-1)) / (R * omega * dist**n)


def ball_poisson_kernel(x, zeta, radius=1.0):
    r"""Poisson kernel of the ball in :math:`\mathbb R^3`, centred at the origin.

    Parameters
    ----------
    x : array_like of shape (..., 3)
        Interior points.
    zeta : array_like of shape (..., 3)
        Points on the sphere of radius ``radius``.
    radius : float, default=1.0

    Returns
    -------
    ndarray
        :math:`P(x,\zeta) = (R^2 - |x|^2)/(4\pi R\,|x-\zeta|^3)`, a density in surface measure.

    Notes
    -----
    The case :math:`n = 3` of :func:`poisson_kernel_nd` [1]_. In the unit ball it has the
    series :math:`P = \sum_\ell \frac{2\ell+1}{4\pi} r^\ell P_\ell(\cos\gamma)`, with
    :math:`\gamma` the angle between :math:`x` and :math:`\zeta`.

    References
    ----------
    .. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., §2.2.4.

    Examples
    --------
    >>> round(float(ball_poisson_kernel([0.0, 0.0, 0.0], [0.0, 0.0, 1.0])), 12)  # 1/(4 pi)
    0.079577471546
    """
    x = np.asarray(x, dtype=float)
    zeta = np.asarray(zeta, dtype=float)
    R = float(radius)
    dist = np.linalg.norm(x - zeta, axis=-1)
    return (R * R - np.sum(x * x, axis=-1)) / (4 * np.pi * R * dist**3)
