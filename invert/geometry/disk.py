r"""Geometry of the sensed region: basis, design matrices and the Poisson kernel.

This module is the only place that knows the shape of the region. A domain turns points into a
design matrix whose columns are harmonic basis functions, knows the degree of each column and
the Laplace–Beltrami eigenvalue of that degree on the rim (used by the smoothness prior), and
evaluates fields on grids quickly. It depends on NumPy and SciPy only.

Notes
-----
For the disk of radius :math:`R` centred at :math:`c`, with :math:`w = (z - c)/R`, the
coefficient vector is :math:`(a_0, a_1, b_1, \ldots, a_N, b_N)` and

.. math:: u(r,\theta) = a_0 + \sum_{n=1}^{N} \rho^n (a_n \cos n\theta + b_n \sin n\theta)
          = \operatorname{Re} \sum_{n=0}^{N} C_n w^n,\quad C_n = a_n - i b_n,\ \rho = r/R.

References
----------
.. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., AMS, 2010, §2.2.4.
.. [2] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, Cambridge University Press, 2005,
       ch. I.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import DomainError
from .arcs import CircleArcs, arc_fourier_coefficients, arc_harmonic_measure
from .base import PlanarPolar, RoundDomain
from .cartesian import grid_moments
from .polar import ring_variance
from .rims import RimCircles

__all__ = [
    "Disk",
    "poisson_kernel",
    "arc_harmonic_measure",
    "arc_fourier_coefficients",
]

#: Relative distance outside the rim within which a point is taken to lie on the rim. Sensor
#: positions are usually typed with 3–4 significant digits (common practice), so a sensor at
#: (0.7071, 0.7071) on the unit circle sits 1.4e-5 outside it.
RIM_TOLERANCE = 1e-3

#: Points are evaluated in blocks of this many rows so that design blocks stay small in memory.
_BLOCK = 16384


def poisson_kernel(r, theta, phi, radius=1.0):
    r"""Poisson kernel of the disk, normalised as a density in the rim angle.

    Parameters
    ----------
    r : array_like
        Radius of the interior point, ``0 <= r < radius``.
    theta : array_like
        Polar angle of the interior point, radians.
    phi : array_like
        Rim angle, radians.
    radius : float, default=1.0
        Disk radius :math:`R`.

    Returns
    -------
    ndarray
        :math:`P` broadcast over the inputs.

    Notes
    -----
    .. math:: P(r,\theta;\varphi) = \frac{1}{2\pi}
              \frac{R^2 - r^2}{R^2 - 2Rr\cos(\theta-\varphi) + r^2},
    so that :math:`\int_0^{2\pi} P\,d\varphi = 1` and
    :math:`u(r,\theta) = \int_0^{2\pi} P(r,\theta;\varphi) f(\varphi)\,d\varphi` [1]_.

    References
    ----------
    .. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., §2.2.4.

    Examples
    --------
    >>> from scipy.integrate import quad
    >>> round(quad(lambda p: poisson_kernel(0.5, 0.3, p), 0, 2 * np.pi)[0], 12)
    1.0
    """
    r = np.asarray(r, dtype=float)
    R = float(radius)
    return (R * R - r * r) / (2 * np.pi * (R * R - 2 * R * r * np.cos(theta - phi) + r * r))


@dataclass(frozen=True)
class Disk(PlanarPolar, RoundDomain):
    r"""A disk of radius ``radius`` centred at ``center``, with harmonics up to ``n_modes``.

    Parameters
    ----------
    radius : float, default=1.0
        Radius :math:`R`, in the unit of the sensor coordinates.
    center : tuple of float, default=(0.0, 0.0)
        Centre :math:`c`; points are given in the same frame.
    n_modes : int, default=32
        Highest degree :math:`N`; the basis has ``2 * n_modes + 1`` columns.

    Notes
    -----
    Columns are ordered :math:`1, \rho\cos\theta, \rho\sin\theta, \ldots, \rho^N\cos N\theta,
    \rho^N\sin N\theta`. Degree :math:`n` has rim eigenvalue :math:`n^2` (the Laplacian on the
    unit circle), which is what the smoothness prior uses.

    Examples
    --------
    >>> d = Disk(radius=2.0, n_modes=3)
    >>> d.design([[0.0, 0.0], [2.0, 0.0]]).round(3)
    array([[1., 0., 0., 0., 0., 0., 0.],
           [1., 1., 0., 1., 0., 1., 0.]])
    """

    radius: float = 1.0
    center: tuple[float, float] = (0.0, 0.0)
    n_modes: int = 32

    dim = 2
    kind = "disk"
    #: Truncation rule (:meth:`truncation_rule`): omit under 1e-4 of the prior rim variance
    #: (about 1 % of the rim sd); a stage extends up to degree 128, construction caps at 256.
    truncation_tol = 1e-4
    max_degree = 128
    initial_max_degree = 256

    def __post_init__(self):
        if not (np.isfinite(self.radius) and self.radius > 0):
            raise ValueError(f"The 'radius' of Disk must be a positive number. Got {self.radius}.")
        if int(self.n_modes) != self.n_modes or self.n_modes < 0:
            raise ValueError(f"The 'n_modes' of Disk must be an integer >= 0. Got {self.n_modes}.")
        object.__setattr__(self, "center", tuple(float(v) for v in self.center))
        object.__setattr__(self, "n_modes", int(self.n_modes))

    # --- basis bookkeeping -------------------------------------------------------------------
    @property
    def n_coef(self) -> int:
        """Number of coefficients, ``2 * n_modes + 1``."""
        return 2 * self.n_modes + 1

    @property
    def degrees(self) -> np.ndarray:
        """Degree ``n`` of each column, shape ``(n_coef,)``."""
        return np.concatenate([[0], np.repeat(np.arange(1, self.n_modes + 1), 2)])

    @property
    def eigenvalues(self) -> np.ndarray:
        """Rim Laplacian eigenvalue ``n**2`` of each column."""
        return self.degrees.astype(float) ** 2

    @staticmethod
    def degree_multiplicity(n):
        """Return the number of basis functions of degree ``n`` (1 for ``n = 0``, else 2)."""
        return np.where(np.asarray(n) == 0, 1, 2)

    @staticmethod
    def degree_eigenvalue(n):
        """Rim Laplacian eigenvalue of degree ``n`` on the unit circle, ``n**2``."""
        return np.asarray(n, dtype=float) ** 2

    @staticmethod
    def rim_mean_square(n):
        r"""Sum over the columns of degree ``n`` of their mean square on the rim.

        :math:`\cos^2 n\theta` and :math:`\sin^2 n\theta` average 1/2 on the circle, so a
        degree :math:`n \ge 1` contributes :math:`2 \cdot 1/2`; the constant column 1.
        """
        n = np.asarray(n)
        return np.where(n == 0, 1.0, Disk.degree_multiplicity(n) * 0.5)

    @property
    def coefficient_names(self) -> tuple:
        """``("a0", "a1", "b1", ..., "aN", "bN")``."""
        return ("a0",) + tuple(f"{ab}{n}" for n in range(1, self.n_modes + 1) for ab in "ab")

    def rim_search_size(self) -> int:
        """``max(720, 16 * n_modes)``: at least 16 rim points per shortest wavelength."""
        return int(max(720, 16 * self.n_modes))

    def region_mean_square(self) -> np.ndarray:
        r"""Diagonal of :math:`\frac{1}{\pi R^2}\int_\text{disk} h h^\top dA` (it is diagonal).

        Notes
        -----
        The columns :math:`\rho^n\cos n\theta`, :math:`\rho^n\sin n\theta` are orthogonal
        over the disk, and :math:`\frac1\pi\int_0^1\int_0^{2\pi}\rho^{2n}\cos^2
        n\theta\,d\theta\,\rho\,d\rho = \frac{1}{2n+2}` for :math:`n \ge 1`; the constant
        column gives 1.
        """
        n = np.asarray(self.degrees, float)
        return np.where(n == 0, 1.0, 1.0 / (2 * n + 2))

    @property
    def rim_arcs(self) -> CircleArcs:
        """Angle-based rim tools (:class:`~invert.geometry.arcs.CircleArcs`)."""
        return CircleArcs(self)

    @property
    def rim_circles(self) -> RimCircles:
        """The rim as one named circle (:class:`~invert.geometry.rims.RimCircles`)."""
        return RimCircles(self, ("rim",), (1.0,), "interior", "disk")

    @staticmethod
    def rim_attenuation(k, rho, degrees) -> np.ndarray:
        r"""Damping :math:`\rho^n` of the rim's degree-``n`` harmonic (``k`` is 0, the rim)."""
        rho = np.atleast_1d(np.asarray(rho, float))
        return rho[:, None] ** np.atleast_1d(np.asarray(degrees))[None, :]

    def rim_column_mask(self, k) -> np.ndarray:
        """Mask of the columns of rim ``k``'s function: every column (one rim)."""
        return np.ones(self.n_coef, bool)

    # --- geometry ------------------------------------------------------------------------------
    def _w(self, points) -> np.ndarray:
        p = np.asarray(points, dtype=float)
        if p.ndim != 2 or p.shape[1] != 2:
            raise ValueError(f"points must have shape (n_points, 2). Got {p.shape} instead.")
        return ((p[:, 0] - self.center[0]) + 1j * (p[:, 1] - self.center[1])) / self.radius

    def locate(self, points, *, tol: float = RIM_TOLERANCE):
        """Scaled complex position of each point, snapping near-rim points onto the rim.

        Parameters
        ----------
        points : array_like of shape (n_points, 2)
        tol : float, default=RIM_TOLERANCE
            Points with ``1 < r/R <= 1 + tol`` are moved radially onto the rim; points with
            ``1 - tol <= r/R <= 1`` are also reported as rim points.

        Returns
        -------
        w : ndarray of complex, shape (n_points,)
            ``(z - c) / R`` after snapping.
        on_rim : ndarray of bool
            Points taken to lie on the rim.
        n_snapped : int
            How many points were moved onto the rim from more than 1e-6 R outside it (closer
            than that is rounding of typed coordinates and is not counted).

        Raises
        ------
        DomainError
            If a point lies farther outside than the tolerance; ``index`` names the first one.
        """
        w = self._w(points)
        if not np.all(np.isfinite(w)):
            i = int(np.flatnonzero(~np.isfinite(w))[0])
            raise DomainError(f"point {i} has a non-finite coordinate", i)
        rho = np.abs(w)
        outside = rho > 1 + tol
        if outside.any():
            i = int(np.flatnonzero(outside)[0])
            raise DomainError(
                f"point ({np.asarray(points)[i, 0]:g}, {np.asarray(points)[i, 1]:g}) lies outside "
                f"the disk: r/R = {rho[i]:.6g} > 1",
                i,
            )
        snap = rho > 1
        w = np.where(snap, w / np.where(snap, rho, 1.0), w)
        on_rim = rho >= 1 - tol
        return w, on_rim, int((rho > 1 + 1e-6).sum())

    def rotated_design(self, points, angle) -> np.ndarray:
        """Design rows of ``points`` turned about the centre by ``angle`` (radians, ccw).

        Parameters
        ----------
        points : ndarray of shape (m, 2)
        angle : ndarray of shape (n_batch, m)

        Returns
        -------
        ndarray of shape (n_batch * m, n_coef)
            Rows of turn ``b`` of point ``i`` at ``b * m + i`` (reshape to (n_batch, m, n_coef)).
            Points snapped onto the rim (``rho`` slightly above 1) stay on it.
        """
        rho, theta = self.to_polar(points)
        rho = np.minimum(rho, 1.0)
        angle = np.asarray(angle, float)
        pts = self.from_polar(np.broadcast_to(rho, angle.shape), theta[None, :] + angle)
        return self.design(pts)

    # --- design matrices -------------------------------------------------------------------
    def _design_w(self, w: np.ndarray) -> np.ndarray:
        # Columns Re w^n and Im w^n by the recurrence w^n = w^(n-1) w in real arithmetic
        # (|w| <= 1 keeps it stable), written row by row into G^T so that every step is one
        # contiguous pass (the same operations, in the same order, as numpy's complex product;
        # about 4x faster than a cumulative product over a broadcast array). Returns the
        # (n_points, n_coef) transpose view of G^T.
        N, n = self.n_modes, w.size
        GT = np.empty((2 * N + 1, n))
        GT[0] = 1.0
        if N:
            x, y = GT[1], GT[2]
            x[:], y[:] = w.real, w.imag
            t = np.empty(n)
            for k in range(2, N + 1):
                c, s = GT[2 * k - 3], GT[2 * k - 2]
                re, im = GT[2 * k - 1], GT[2 * k]
                np.multiply(c, x, out=re)
                np.multiply(s, y, out=t)
                re -= t
                np.multiply(c, y, out=im)
                np.multiply(s, x, out=t)
                im += t
        return GT.T

    def design(self, points) -> np.ndarray:
        r"""Design matrix :math:`G` with ``G @ c`` = field values at ``points``.

        Parameters
        ----------
        points : array_like of shape (n_points, 2)
            Points inside or on the rim (within :data:`RIM_TOLERANCE`).

        Returns
        -------
        ndarray of shape (n_points, n_coef)
        """
        w, _, _ = self.locate(points)
        return self._design_w(w)

    def design_gradient(self, points) -> np.ndarray:
        r"""Linear maps from coefficients to the gradient, shape ``(n_points, 2, n_coef)``.

        Notes
        -----
        With :math:`F(w) = \sum C_n w^n`, :math:`u = \operatorname{Re} F` and
        :math:`\partial_x u - i\,\partial_y u = F'(w)/R`. For the column :math:`\operatorname{Re}
        w^n` the gradient is :math:`(\operatorname{Re}, -\operatorname{Im})(n w^{n-1})/R`; for
        :math:`\operatorname{Im} w^n` it is :math:`(\operatorname{Im}, \operatorname{Re})(n
        w^{n-1})/R`.
        """
        w, _, _ = self.locate(points)
        N = self.n_modes
        D = np.zeros((w.size, 2, 2 * N + 1))
        if N:
            n = np.arange(1, N + 1)
            prev = np.ones((w.size, N), dtype=complex)
            if N > 1:
                prev[:, 1:] = np.cumprod(np.broadcast_to(w[:, None], (w.size, N - 1)), axis=1)
            dw = n * prev / self.radius
            D[:, 0, 1::2] = dw.real
            D[:, 1, 1::2] = -dw.imag
            D[:, 0, 2::2] = dw.imag
            D[:, 1, 2::2] = dw.real
        return D

    def design_normal_derivative(self, points) -> np.ndarray:
        r"""Return rows mapping coefficients to the radial derivative.

        Rows mapping coefficients to the radial derivative :math:`\partial u/\partial r` at
        ``points`` (on the rim: the outward normal derivative).

        Parameters
        ----------
        points : array_like of shape (n_points, 2)
            Off the centre, where the direction is undefined and the rows are NaN.

        Returns
        -------
        ndarray of shape (n_points, n_coef)

        Notes
        -----
        :math:`\partial_r u = \sum_n (n/R)\rho^{n-1}(a_n\cos n\theta + b_n\sin n\theta)`, on
        the rim :math:`\sum_n (n/R)(a_n\cos n\theta + b_n\sin n\theta)`.
        """
        w, _, _ = self.locate(points)
        rho, theta = np.abs(w), np.angle(w)
        n = np.arange(1, self.n_modes + 1)
        D = np.zeros((w.size, self.n_coef))
        scale = n / self.radius * rho[:, None] ** (n - 1)
        D[:, 1::2] = scale * np.cos(np.outer(theta, n))
        D[:, 2::2] = scale * np.sin(np.outer(theta, n))
        D[rho == 0] = np.nan
        return D

    # --- fast evaluation -------------------------------------------------------------------
    def _complex_coef(self, coef) -> np.ndarray:
        coef = np.asarray(coef, dtype=float)
        if coef.shape[-1] != self.n_coef:
            raise ValueError(
                f"coef has {coef.shape[-1]} entries, but expected {self.n_coef} for n_modes="
                f"{self.n_modes}."
            )
        C = np.empty(coef.shape[:-1] + (self.n_modes + 1,), dtype=complex)
        C[..., 0] = coef[..., 0]
        C[..., 1:] = coef[..., 1::2] - 1j * coef[..., 2::2]
        return C

    def _horner(self, C: np.ndarray, w: np.ndarray) -> np.ndarray:
        acc = np.full(w.shape, C[-1], dtype=complex)
        for Cn in C[-2::-1]:
            acc *= w
            acc += Cn
        return acc

    def analytic(self, coef, points) -> np.ndarray:
        r"""Return the analytic function whose real part is the field.

        The analytic function :math:`F(w) = u + i v` at ``points``, by Horner's rule in
        :math:`w = (z-c)/R`; ``v`` is the harmonic conjugate with :math:`v(c) = 0`.
        """
        C = self._complex_coef(coef)
        w, _, _ = self.locate(points)
        return self._horner(C, w)

    def field(self, coef, points) -> np.ndarray:
        """Field values ``u`` at ``points`` for coefficient vector ``coef`` (Horner's rule)."""
        return self.analytic(coef, points).real

    def conjugate(self, coef, points) -> np.ndarray:
        """Return the harmonic conjugate (stream function) of the field.

        Harmonic conjugate ``v`` (stream function) with ``v(center) = 0``; flux lines of
        ``-k grad u`` are its level sets.
        """
        return self.analytic(coef, points).imag

    def gradient(self, coef, points) -> np.ndarray:
        """Gradient of ``u`` at ``points``, shape (n_points, 2), from ``F'(w)/R``."""
        C = self._complex_coef(coef)
        w, _, _ = self.locate(points)
        n = np.arange(1, self.n_modes + 1)
        dF = self._horner(C[1:] * n, w) if self.n_modes else np.zeros_like(w)
        dF = dF / self.radius
        return np.column_stack([dF.real, -dF.imag])

    def normal_flux(self, coef, points, conductivity=1.0) -> np.ndarray:
        """Outward flux density ``-k du/dr`` through the rim at rim ``points``."""
        return -conductivity * self.design_normal_derivative(points) @ np.asarray(coef, float)

    # --- grids -----------------------------------------------------------------------------
    def rim_grid(self, n: int = 360):
        """Points on the rim at ``n`` equally spaced angles, and their table columns.

        Returns
        -------
        points : ndarray of shape (n, 2)
        columns : dict
            ``{"theta_deg": ...}`` in degrees, counter-clockwise from the +x axis.
        """
        theta_deg = np.arange(n) * (360.0 / n)
        return self.from_polar(1.0, np.deg2rad(theta_deg)), {"theta_deg": theta_deg}

    def interior_grid(self, n: int = 101):
        """Points of an ``n`` x ``n`` square grid over the disk, with a mask of those inside.

        Returns
        -------
        xs, ys : ndarray of shape (n,)
            Grid axes.
        points : ndarray of shape (n*n, 2)
            All grid points, row-major in ``y`` then ``x``.
        inside : ndarray of bool, shape (n*n,)
        """
        xs = self.center[0] + self.radius * np.linspace(-1, 1, n)
        ys = self.center[1] + self.radius * np.linspace(-1, 1, n)
        X, Y = np.meshgrid(xs, ys)
        pts = np.column_stack([X.ravel(), Y.ravel()])
        rho = np.hypot(pts[:, 0] - self.center[0], pts[:, 1] - self.center[1]) / self.radius
        return xs, ys, pts, rho <= 1.0

    def polar_grid(self, rho, n_angles: int):
        """Points on rings at relative radii ``rho``, ``n_angles`` equally spaced angles from 0.

        Returns an array of shape (len(rho) * n_angles, 2), ring by ring.
        """
        th = np.arange(int(n_angles)) * (2 * np.pi / int(n_angles))
        return self.from_polar(np.asarray(rho, float)[:, None], th[None, :])

    def ring_variance(self, cov, rho, n_angles: int) -> np.ndarray:
        """Exact field variance on :meth:`polar_grid` (one FFT per ring, :mod:`.polar`)."""
        return ring_variance(cov, self.n_modes, rho, n_angles).ravel()

    def grid_moments(self, coef, root, x, y):
        """Mean and variance on the tensor grid ``x`` by ``y`` (:mod:`.cartesian`), or None."""
        return grid_moments(coef, root, x, y, center=self.center, radius=self.radius,
                            n_modes=self.n_modes, design_rows=self._design_w)

    def field_grid(self, n: int = 81):
        """Interior points of an ``n`` x ``n`` grid and their table columns ``{"x", "y"}``."""
        _, _, pts, inside = self.interior_grid(n)
        pts = pts[inside]
        return pts, {"x": pts[:, 0], "y": pts[:, 1]}

    def rim_coefficients(self, values) -> np.ndarray:
        """Return the coefficients of sampled rim values.

        Coefficients of the trigonometric interpolant of rim ``values`` sampled at
        ``len(values)`` equally spaced angles from 0 (FFT), truncated to ``n_modes``.
        """
        f = np.asarray(values, dtype=float)
        M = f.size
        F = np.fft.rfft(f) / M
        c = np.zeros(self.n_coef)
        c[0] = F[0].real
        n = min(self.n_modes, (M - 1) // 2)
        c[1 : 2 * n + 1 : 2] = 2 * F[1 : n + 1].real
        c[2 : 2 * n + 2 : 2] = -2 * F[1 : n + 1].imag
        return c
