"""Grids and quadrature on the ball: latitude/longitude rim grid, central slices, product rule.

:class:`SphereGrids` is a mixin of :class:`~invert.geometry.ball.Ball`; it uses only the ball's
``center``, ``radius``, ``n_modes``, ``design`` and ``from_latlon`` / ``from_spherical``.
"""

from __future__ import annotations

import numpy as np

__all__ = ["SphereGrids"]

_AXES = {"x": 0, "y": 1, "z": 2}


class SphereGrids:
    """Grid methods of the ball (rim grid, slices, field grid, rim quadrature)."""

    def rim_grid(self, n: int = 360):
        """Points of a latitude/longitude grid on the sphere, and their table columns.

        Parameters
        ----------
        n : int, default=360
            Resolution, read as on the disk's rim (``n`` points per full circle) but thinned
            five-fold: the grid spacing is ``1800 / n`` degrees, so ``n = 360`` gives a 5-degree
            grid of 37 latitudes x 72 longitudes = 2664 points (both poles included, each
            repeated once per longitude so the table is a full rectangle).

        Returns
        -------
        points : ndarray of shape (n_lat * n_lon, 3)
            Latitude-major order (south to north, then west to east).
        columns : dict
            ``{"lat_deg": ..., "lon_deg": ...}``; latitude is 90 degrees minus the polar angle
            from ``+z``, longitude the azimuth from ``+x`` in [-180, 180).
        """
        n_lon = max(int(round(n / 5)), 4)
        n_lat = max(int(round(n / 10)), 2) + 1
        lat = np.linspace(-90.0, 90.0, n_lat)
        lon = -180.0 + np.arange(n_lon) * (360.0 / n_lon)
        LAT, LON = np.meshgrid(lat, lon, indexing="ij")
        pts = self.from_latlon(LAT.ravel(), LON.ravel())
        return pts, {"lat_deg": LAT.ravel(), "lon_deg": LON.ravel()}

    def slice_grid(self, n: int = 101, axis="z", offset: float = 0.0):
        """Return an ``n`` x ``n`` grid on the plane through the centre normal to ``axis``.

        Parameters
        ----------
        n : int, default=101
        axis : {"x", "y", "z"} or {0, 1, 2}, default="z"
            Normal of the plane; ``"z"`` gives the equatorial (x, y) slice.
        offset : float, default=0.0
            Distance of the plane from the centre along ``axis``, in the unit of the radius.

        Returns
        -------
        us, vs : ndarray of shape (n,)
            Grid axes: the remaining two coordinates in order (x, y), (x, z) or (y, z).
        points : ndarray of shape (n*n, 3)
            All grid points, row-major in ``v`` then ``u``.
        inside : ndarray of bool, shape (n*n,)
        """
        k = _AXES.get(axis, axis) if isinstance(axis, str) else int(axis)
        if k not in (0, 1, 2):
            raise ValueError(f"The 'axis' parameter of slice_grid must be 'x', 'y' or 'z'. "
                             f"Got {axis!r} instead.")
        iu, iv = [j for j in range(3) if j != k]
        c = np.asarray(self.center)
        us = c[iu] + self.radius * np.linspace(-1, 1, n)
        vs = c[iv] + self.radius * np.linspace(-1, 1, n)
        U, V = np.meshgrid(us, vs)
        pts = np.empty((n * n, 3))
        pts[:, iu], pts[:, iv], pts[:, k] = U.ravel(), V.ravel(), c[k] + offset
        inside = np.linalg.norm(pts - c, axis=1) <= self.radius
        return us, vs, pts, inside

    def field_grid(self, n: int = 81):
        """Return interior points of the three central slices and their table columns.

        The slices are the planes z = c_z, y = c_y, x = c_x, each an ``n`` x ``n`` grid; the
        columns are ``{"x", "y", "z"}``.
        """
        parts = []
        for axis in ("z", "y", "x"):
            _, _, pts, inside = self.slice_grid(n, axis)
            parts.append(pts[inside])
        pts = np.vstack(parts)
        return pts, {"x": pts[:, 0], "y": pts[:, 1], "z": pts[:, 2]}

    def rim_quadrature(self, n_lat: int | None = None):
        r"""Return a product quadrature rule for the mean over the sphere.

        Gauss–Legendre in :math:`\cos\vartheta` times a uniform rule in :math:`\varphi`.

        Parameters
        ----------
        n_lat : int, optional
            Number of Gauss–Legendre nodes; default ``n_modes + 1``. With ``2 * n_lat``
            azimuths the rule integrates every spherical polynomial of degree
            ``<= 2 * n_lat - 1`` exactly, so Gram matrices of degree ``<= n_lat - 1`` are exact.

        Returns
        -------
        points : ndarray of shape (n_lat * 2 * n_lat, 3)
        weights : ndarray
            Weights of the surface *mean* (they sum to 1).
        """
        n_lat = self.n_modes + 1 if n_lat is None else int(n_lat)
        t, wt = np.polynomial.legendre.leggauss(n_lat)
        n_lon = 2 * n_lat
        phi = np.arange(n_lon) * (2 * np.pi / n_lon)
        T, P = np.meshgrid(np.arccos(t), phi, indexing="ij")
        W = np.repeat(wt / 2, n_lon) / n_lon
        return self.from_spherical(1.0, T.ravel(), P.ravel()), W

    def rim_coefficients(self, values, n_lat: int | None = None) -> np.ndarray:
        """Return the coefficients of sampled rim values.

        Coefficients of surface ``values`` sampled at the nodes of
        :meth:`rim_quadrature` (``n_lat``), by quadrature: ``c_j = mean(f * B_j)``.

        Exact for band-limited data of degree ``<= n_lat - 1`` (``n_lat`` defaults to
        ``n_modes + 1``).
        """
        pts, w = self.rim_quadrature(n_lat)
        f = np.asarray(values, dtype=float)
        if f.shape != w.shape:
            raise ValueError(f"values must have shape {w.shape} (the quadrature nodes). "
                             f"Got {f.shape} instead.")
        return self.design(pts).T @ (w * f)
