r"""The rim circles of a plane region bounded by circles about one centre (a disk, an annulus).

A domain whose boundary is one or more circles about its centre, each parametrised by the polar
angle, offers :class:`RimCircles` as its ``rim_circles`` attribute. Advice (candidate sites on
every rim and inside the region, sensor spacing along each rim) and the per-rim diagnostics
(unsensed arcs, depth of information from each rim) ask it for what they need, never the
domain's kind. The domain supplies the one piece of mathematics that differs between shapes,
``rim_attenuation(k, rho, degrees)``: the value at relative radius ``rho`` of rim ``k``'s
harmonic of degree ``n`` that is 1 on rim ``k`` and 0 on the others (:math:`\rho^n` on a disk,
the radial profiles of :func:`~invert.geometry.annulus.radial_profiles` on an annulus).
"""

from __future__ import annotations

import numpy as np

__all__ = ["RimCircles", "ADVICE_FRACTIONS"]

#: Interior candidate rings of the sensor advice, as fractions of the way from the innermost
#: boundary (the centre of a disk, the bore of an annulus) to the outer rim.
ADVICE_FRACTIONS = (0.25, 0.5, 0.75)


class RimCircles:
    """Rim circles ``rho = radii[k]`` of a plane polar domain, with their names.

    Parameters
    ----------
    domain : Domain
        Provides ``to_polar``, ``from_polar``, ``inner_relative_radius`` and
        ``rim_attenuation``.
    names : tuple of str
        One name per circle, outermost first (``("rim",)``; ``("outer", "inner")``).
    radii : tuple of float
        Relative radii of the circles (1 for the outer rim).
    interior : str
        Name of a position on no rim (``"interior"``, ``"wall"``).
    region : str
        Name of the region in sentences (``"disk"``, ``"wall"``).
    """

    def __init__(self, domain, names, radii, interior, region):
        self.domain = domain
        self.names = tuple(names)
        self.radii = tuple(float(r) for r in radii)
        self.interior = interior
        self.region = region

    def polar(self, points):
        """``(rho, theta)`` of ``points``: relative radius and polar angle (radians)."""
        return self.domain.to_polar(np.asarray(points, float))

    def ring(self, rho, theta):
        """Points at relative radius ``rho`` and polar angle ``theta`` (radians)."""
        return self.domain.from_polar(rho, theta)

    def which(self, points, tol=1e-3) -> np.ndarray:
        """Index of the rim each point lies on (within ``tol`` relative radius), else -1."""
        rho, _ = self.polar(points)
        out = np.full(rho.shape, -1)
        for k, r in reversed(list(enumerate(self.radii))):
            out[np.abs(rho - r) <= tol] = k
        return out

    def position_names(self, points, tol=1e-3) -> np.ndarray:
        """Name of the rim of each point, or :attr:`interior` (object array)."""
        k = self.which(points, tol)
        names = np.array(self.names + (self.interior,), dtype=object)
        return names[np.where(k >= 0, k, len(self.names))]

    def rim_angles(self, points, k, tol=1e-3) -> np.ndarray:
        """Angles in ``[0, 2*pi)`` of the points on rim ``k`` (others dropped)."""
        if points is None or len(points) == 0:
            return np.array([])
        _, th = self.polar(points)
        return np.mod(th[self.which(points, tol) == k], 2 * np.pi)

    def interior_radii(self, fractions=ADVICE_FRACTIONS) -> np.ndarray:
        """Relative radii the given fractions of the way from the inner boundary to the rim."""
        a = float(self.domain.inner_relative_radius)
        return a + np.asarray(fractions, float) * (1.0 - a)

    def attenuation(self, k, rho, degrees) -> np.ndarray:
        """Rim ``k``'s harmonic of each degree at relative radii ``rho``, (n_rho, n_degrees)."""
        return self.domain.rim_attenuation(k, rho, degrees)

    def rim_columns(self, k) -> np.ndarray:
        """Mask of the coefficient columns of rim ``k``'s function."""
        return self.domain.rim_column_mask(k)
