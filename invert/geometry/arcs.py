r"""Rim arcs of a disk: rim angles of points, harmonic measure of arcs, rings at a radius.

A domain whose rim is one circle parametrised by the polar angle offers these tools as its
``rim_arcs`` attribute (:class:`CircleArcs`); the gap, depth and rim-profile diagnostics use
them and are skipped for a domain whose ``rim_arcs`` is ``None``.

Notes
-----
The harmonic measure at :math:`z` (unit disk) of the ccw arc :math:`(\alpha, \beta)` is
:func:`arc_harmonic_measure`; the symmetric arc below a point at
relative radius :math:`\rho` holding half of its Poisson-kernel mass has width
:math:`4\arctan\frac{1-\rho}{1+\rho}` (Garnett & Marshall 2005, ch. I).

References
----------
.. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, Cambridge University Press, 2005,
       ch. I. doi:10.1017/CBO9780511546617
"""

from __future__ import annotations

import numpy as np

__all__ = ["CircleArcs", "arc_harmonic_measure", "arc_fourier_coefficients", "half_mass_width"]


def arc_harmonic_measure(z, alpha, beta):
    r"""Harmonic measure at ``z`` of the counter-clockwise rim arc from ``alpha`` to ``beta``.

    Parameters
    ----------
    z : complex or array_like of complex
        Points in the open unit disk.
    alpha, beta : float
        Arc end angles in radians, ``alpha < beta <= alpha + 2*pi``.

    Returns
    -------
    ndarray
        The probability that Brownian motion from ``z`` leaves the disk through the arc, equal
        to the Poisson-kernel mass of the arc.

    Notes
    -----
    .. math:: \omega(z) = \frac{1}{\pi}\arg_{[0,2\pi)}\frac{e^{i\beta}-z}{e^{i\alpha}-z}
              - \frac{\beta-\alpha}{2\pi}

    with the argument taken in :math:`[0, 2\pi)` (Garnett & Marshall 2005, ch. I).
    """
    z = np.asarray(z, dtype=complex)
    ang = np.angle((np.exp(1j * beta) - z) / (np.exp(1j * alpha) - z))
    ang = np.mod(ang, 2 * np.pi)
    return ang / np.pi - (beta - alpha) / (2 * np.pi)


def arc_fourier_coefficients(alpha, beta, n_modes):
    r"""Fourier coefficients of the indicator of the rim arc ``alpha``–``beta``.

    Returns the vector ``(a0, a1, b1, ..., aN, bN)`` with :math:`a_0 = (\beta-\alpha)/2\pi`,
    :math:`a_n = (\sin n\beta - \sin n\alpha)/(n\pi)`,
    :math:`b_n = (\cos n\alpha - \cos n\beta)/(n\pi)`.
    """
    n = np.arange(1, n_modes + 1)
    c = np.empty(2 * n_modes + 1)
    c[0] = (beta - alpha) / (2 * np.pi)
    c[1::2] = (np.sin(n * beta) - np.sin(n * alpha)) / (n * np.pi)
    c[2::2] = (np.cos(n * alpha) - np.cos(n * beta)) / (n * np.pi)
    return c


def half_mass_width(rho):
    r"""Return the width of the rim arc holding half a point's kernel mass.

    Width (radians) of the rim arc, centred below a point at relative radius ``rho``, that
    holds half of its Poisson-kernel mass.

    Notes
    -----
    The symmetric arc :math:`|\varphi-\theta| < a` has harmonic measure
    :math:`\frac{2}{\pi}\arctan(k\tan\frac a2)`, :math:`k = (1+\rho)/(1-\rho)` [1]_; setting it
    to 1/2 gives :math:`a = 2\arctan\frac{1-\rho}{1+\rho}` and width
    :math:`4\arctan\frac{1-\rho}{1+\rho}` (:math:`\pi` at the centre, 0 at the rim).

    References
    ----------
    .. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, 2005, ch. I.
    """
    rho = np.asarray(rho, float)
    return 4.0 * np.arctan((1.0 - rho) / (1.0 + rho))


class CircleArcs:
    """Angle-based rim tools of a domain with ``to_polar`` and ``from_polar`` (a disk).

    Parameters
    ----------
    domain : Disk
        Any domain whose rim is the circle ``rho = 1`` parametrised by the polar angle.
    """

    def __init__(self, domain):
        self.domain = domain

    def polar(self, points):
        """``(rho, theta)`` of ``points``: relative radius and polar angle (radians)."""
        return self.domain.to_polar(np.asarray(points, float))

    def ring(self, rho, theta):
        """Points at relative radius ``rho`` and polar angle ``theta`` (radians)."""
        return self.domain.from_polar(rho, theta)

    def rim_angles(self, points, tol=1e-3) -> np.ndarray:
        """Angles in ``[0, 2*pi)`` of the points within ``tol`` of the rim (others dropped)."""
        if points is None or len(points) == 0:
            return np.array([])
        rho, th = self.polar(points)
        return np.mod(th[rho >= 1 - tol], 2 * np.pi)

    def _unit_z(self, points):
        # Scaled complex position, moved in by 1e-12 R so rim points stay inside.
        rho, th = self.polar(points)
        rho = np.minimum(rho, 1 - 1e-12)
        return rho, rho * np.exp(1j * th)

    def harmonic_measure(self, points, arcs) -> np.ndarray:
        """Harmonic measure at ``points`` of the union of disjoint ccw rim ``arcs``.

        Parameters
        ----------
        points : array_like of shape (n_points, 2)
        arcs : array_like of shape (n_arcs, 2)
            ``(alpha, beta)`` in radians.

        Returns
        -------
        ndarray of shape (n_points,)
            Not clipped; rim points are moved in by 1e-12 R.
        """
        _, z = self._unit_z(points)
        share = np.zeros(len(z))
        for a, b in np.asarray(arcs, float).reshape(-1, 2):
            share += arc_harmonic_measure(z, a, b)
        return share

    def centre_measure(self, arcs) -> float:
        """Harmonic measure of the union of ``arcs`` at the centre (their share of the rim)."""
        arcs = np.asarray(arcs, float).reshape(-1, 2)
        return float(np.sum(arc_harmonic_measure(0.0, arcs[:, 0], arcs[:, 1])))

    def half_mass_width(self, points) -> np.ndarray:
        """:func:`half_mass_width` (radians) at ``points`` (rim points moved in by 1e-12 R)."""
        rho, _ = self._unit_z(points)
        return half_mass_width(rho)
