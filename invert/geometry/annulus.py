r"""The annulus :math:`a \le r \le b`: a pipe or tube wall, with a rim function on each circle.

:class:`Annulus` provides the :class:`~invert.geometry.base.Domain` contract, so the linear
problem, the stages and the outputs work on it unchanged. Its coefficients are the Fourier
coefficients of the two rim functions, the outer one :math:`f_o(\theta) = u(b, \theta)` and the
inner one :math:`f_i(\theta) = u(a, \theta)`. This module depends on NumPy only.

Notes
-----
Separation of variables for Laplace's equation in polar coordinates [1]_ gives the harmonic
functions of the annulus as :math:`1, \ln r` and :math:`r^{\pm n}\cos n\theta, r^{\pm n}\sin
n\theta`. Solving each degree's 2 x 2 system for the rim values (value 1 on one rim, 0 on the
other) gives the radial profiles, with :math:`s = \ln(r/a)`, :math:`t = \ln(b/r)` and
:math:`L = \ln(b/a) = s + t`:

.. math::
   f_n(r) = \frac{(r/b)^n - (a^2/(rb))^n}{1 - (a/b)^{2n}} = \frac{\sinh ns}{\sinh nL},\qquad
   g_n(r) = \frac{(a/r)^n - (ar/b^2)^n}{1 - (a/b)^{2n}} = \frac{\sinh nt}{\sinh nL},

and, as :math:`n \to 0`, :math:`f_0 = s/L = \ln(r/a)/\ln(b/a)`, :math:`g_0 = t/L`. So

.. math:: u(r,\theta) = \sum_{n=0}^{N} f_n(r)\,(A_n\cos n\theta + B_n\sin n\theta)
          + g_n(r)\,(C_n\cos n\theta + D_n\sin n\theta),

where :math:`A_n, B_n` are the Fourier coefficients of :math:`f_o` and :math:`C_n, D_n` those of
:math:`f_i` (:math:`B_0 = D_0 = 0`). The profiles are evaluated as

.. math:: \frac{\sinh ns}{\sinh nL} = e^{-nt}\,\frac{\operatorname{expm1}(-2ns)}
          {\operatorname{expm1}(-2nL)},

every factor in :math:`[0, 1]`, with no overflow for large :math:`n` and no cancellation for thin
walls (:math:`nL \to 0`, where the profile tends to :math:`s/L`); :math:`s` and :math:`t` come
from ``log1p`` of the relative distances to the rims. The raw powers :math:`r^{\pm n}` would
have a condition number of about :math:`(b/a)^N` for thick walls (1e32 at :math:`a/b = 0.1`,
:math:`N = 32`; 7e33 measured) and grows like :math:`1/\ln(b/a)` for thin ones (about
200 at :math:`a/b = 0.99`); in this basis the design on the two
rim grids is exactly the Fourier matrix of each rim (condition number :math:`\sqrt 2` at any
:math:`a/b`; checked at 0.99 and 0.1 in ``tests/reference/test_annulus.py``).

Columns are ordered degree by degree, ``o_a0, i_a0, o_a1, o_b1, i_a1, i_b1, ...`` (``o_``
outer, ``i_`` inner), so raising the truncation appends columns. The smoothness prior treats
the two rim functions as **independent**, each with the disk's prior (degree :math:`n` has rim
eigenvalue :math:`n^2`, both mean levels broad); any correlation between the rims comes from the
readings. The net heat flow per unit length through the wall, radially outward, is
:math:`Q = -2\pi k\,d_0` with :math:`d_0 = (A_0 - C_0)/L` the coefficient of :math:`\ln r`
(:meth:`Annulus.heat_flow_row`).

References
----------
.. [1] W. A. Strauss, *Partial Differential Equations: An Introduction*, 2nd ed., Wiley, 2008,
       §6.4 (circles, wedges and annuli).
.. [2] T. L. Bergman, A. S. Lavine, F. P. Incropera and D. P. DeWitt, *Fundamentals of Heat
       and Mass Transfer*, 7th ed., Wiley, 2011, §3.3.1 (the cylindrical wall).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from ..errors import DomainError
from ..prior import truncation_degree
from .base import PlanarPolar, RoundDomain
from .rims import RimCircles
from .wall_profiles import radial_profiles, wall_mean_square_blocks

__all__ = ["Annulus", "radial_profiles"]

#: Relative distance (in units of the outer radius) within which a point is taken to lie on a
#: rim, as on the disk (sensor positions typed with 3-4 significant digits); it is capped at a
#: quarter of the wall and half the inner radius so that the two rims never overlap.
RIM_TOLERANCE = 1e-3

#: Points are evaluated in blocks of this many rows so that design blocks stay small in memory.
_BLOCK = 8192

#: Largest a/b for which ``field`` sums power series by Horner's rule (rounding amplified by at
#: most 1/(2 ln(b/a)) ~ 5); thinner walls are evaluated through the design rows.
HORNER_MAX_RATIO = 0.9


def _power_series(C, z):
    # sum_{n=1}^{N} C[n-1] z^n by Horner's rule (|z| <= 1 keeps it stable)
    acc = np.full(z.shape, C[-1], dtype=complex)
    for Cn in C[-2::-1]:
        acc *= z
        acc += Cn
    return acc * z


@dataclass(frozen=True)
class Annulus(PlanarPolar, RoundDomain):
    r"""The wall :math:`a \le |x - c| \le b` with both rim functions up to degree ``n_modes``.

    Parameters
    ----------
    radius : float, default=1.0
        Outer radius :math:`b`, in the unit of the sensor coordinates.
    inner_radius : float, default=0.5
        Inner (bore) radius :math:`a`, ``0 < a < b``.
    center : tuple of float, default=(0.0, 0.0)
    n_modes : int, default=32
        Highest degree :math:`N` of each rim function; ``4 * n_modes + 2`` columns.

    Notes
    -----
    See the module notes for the basis, its conditioning and the prior (independent smoothness
    priors on the two rim functions). ``relative_radius`` is :math:`r/b`, in :math:`[a/b, 1]`
    in the wall; ``rim_grid`` and the rim mean used by the prior cover both rims, each rim
    weighted by angle alone (:meth:`rim_mean_square`).

    Examples
    --------
    >>> d = Annulus(radius=2.0, inner_radius=1.0, n_modes=1)
    >>> d.design([[2.0, 0.0], [-1.0, 0.0]]).round(12) + 0.0
    array([[ 1.,  0.,  1.,  0.,  0.,  0.],
           [ 0.,  1.,  0.,  0., -1.,  0.]])
    """

    radius: float = 1.0
    inner_radius: float = 0.5
    center: tuple[float, float] = (0.0, 0.0)
    n_modes: int = 32

    dim = 2
    kind = "annulus"
    #: Constructor parameters beyond radius, centre and truncation (the CLI's --inner-radius).
    shape_parameters = ("inner_radius",)
    #: The disk's truncation rule: each rim function is a circle function with the disk's prior.
    truncation_tol = 1e-4
    max_degree = 128
    initial_max_degree = 256

    def __post_init__(self):
        b, a = self.radius, self.inner_radius
        if not (np.isfinite(b) and b > 0):
            raise ValueError(f"The 'radius' of Annulus must be a positive number. Got {b}.")
        if not (np.isfinite(a) and 0 < a < b):
            raise ValueError(f"The 'inner_radius' of Annulus must be a number with 0 < "
                             f"inner_radius < radius = {b:g}. Got {a}.")
        if int(self.n_modes) != self.n_modes or self.n_modes < 0:
            raise ValueError(f"The 'n_modes' of Annulus must be an integer >= 0. "
                             f"Got {self.n_modes}.")
        object.__setattr__(self, "center", tuple(float(v) for v in self.center))
        object.__setattr__(self, "n_modes", int(self.n_modes))
        object.__setattr__(self, "radius", float(b))
        object.__setattr__(self, "inner_radius", float(a))

    # --- basis bookkeeping -------------------------------------------------------------------
    @property
    def alpha(self) -> float:
        """Radius ratio :math:`a/b`."""
        return self.inner_radius / self.radius

    @property
    def inner_relative_radius(self) -> float:
        """Relative radius :math:`a/b` of the inner rim (0 for a region reaching the centre)."""
        return self.alpha

    @property
    def log_ratio(self) -> float:
        r""":math:`L = \ln(b/a)`, from ``log1p`` of the relative wall thickness."""
        return float(np.log1p((self.radius - self.inner_radius) / self.inner_radius))

    @property
    def n_coef(self) -> int:
        """Number of coefficients, ``4 * n_modes + 2``."""
        return 4 * self.n_modes + 2

    @property
    def degrees(self) -> np.ndarray:
        """Degree of each column: ``0, 0`` then ``n`` four times for ``n = 1..N``."""
        return np.concatenate([[0, 0], np.repeat(np.arange(1, self.n_modes + 1), 4)])

    @property
    def inner_columns(self) -> np.ndarray:
        """Mask of the columns of the inner rim function."""
        k = np.arange(self.n_coef)
        return np.where(k < 2, k == 1, (k - 2) % 4 >= 2)

    @property
    def sine_columns(self) -> np.ndarray:
        """Mask of the sine columns."""
        k = np.arange(self.n_coef)
        return (k >= 2) & ((k - 2) % 2 == 1)

    @staticmethod
    def degree_multiplicity(n):
        """Return the number of columns of degree ``n`` (2 for ``n = 0``, else 4)."""
        return np.where(np.asarray(n) == 0, 2, 4)

    @staticmethod
    def degree_eigenvalue(n):
        """Rim Laplacian eigenvalue of degree ``n`` on each circle, ``n**2``."""
        return np.asarray(n, dtype=float) ** 2

    @staticmethod
    def rim_mean_square(n):
        r"""Sum over the columns of degree ``n`` of their mean square over the two rims.

        The rim mean is the average of the two rims' angular means. A column is its rim's
        Fourier function on that rim and zero on the other, so each of the four columns of degree
        :math:`n \ge 1` contributes :math:`\tfrac12\cdot\tfrac12` and each constant column
        :math:`\tfrac12`: 1 for every degree, as on the disk (the prior variance of a rim
        function is the disk's).
        """
        return np.ones(np.shape(n))

    @property
    def coefficient_names(self) -> tuple:
        """``("o_a0", "i_a0", "o_a1", "o_b1", "i_a1", "i_b1", ...)``."""
        return ("o_a0", "i_a0") + tuple(f"{rim}_{ab}{n}" for n in range(1, self.n_modes + 1)
                                        for rim in "oi" for ab in "ab")

    @property
    def rim_circles(self) -> RimCircles:
        """The two rims, ``outer`` (relative radius 1) and ``inner`` (``a/b``), and the ``wall``."""
        return RimCircles(self, ("outer", "inner"), (1.0, self.alpha), "wall", "wall")

    def rim_attenuation(self, k, rho, degrees) -> np.ndarray:
        r"""Value at relative radius ``rho`` of rim ``k``'s degree-``n`` harmonic.

        Rim 0 (outer): :math:`\sinh(n\ln(r/a))/\sinh(n\ln(b/a))`; rim 1 (inner): the same with
        :math:`\ln(b/r)` (:func:`radial_profiles`; 1 on its rim, 0 on the other). Shape
        ``(n_rho, n_degrees)``.
        """
        rho = np.clip(np.atleast_1d(np.asarray(rho, float)), self.alpha, 1.0)
        deg = np.atleast_1d(np.asarray(degrees, int))
        s, t = np.log1p((rho - self.alpha) / self.alpha), np.log1p((1.0 - rho) / rho)
        first, second = (s, t) if k == 0 else (t, s)
        value, _ = radial_profiles(first, second, self.log_ratio, int(deg.max(initial=0)))
        return value[:, deg]

    def region_mean_square(self) -> np.ndarray:
        r"""Matrix :math:`M = \frac{1}{\pi(b^2-a^2)}\int_\text{wall} h h^\top dA` (not diagonal).

        The outer and inner columns of one degree and trigonometric factor share their angular
        factor, so :math:`M` has 2 x 2 blocks (:func:`wall_mean_square_blocks`); columns of
        different degree or factor are orthogonal over angle.
        """
        oo, oi, ii = wall_mean_square_blocks(self.alpha, self.log_ratio, self.n_modes)
        deg, inner = self.degrees, self.inner_columns
        k = np.arange(self.n_coef)
        same = (deg[:, None] == deg[None, :]) & (self.sine_columns[:, None] ==
                                                 self.sine_columns[None, :])
        pair = np.where(inner[:, None] & inner[None, :], ii[deg][:, None],
                        np.where(~inner[:, None] & ~inner[None, :], oo[deg][:, None],
                                 oi[deg][:, None]))
        return np.where(same | (k[:, None] == k[None, :]), pair, 0.0)

    def rim_column_mask(self, k) -> np.ndarray:
        """Mask of the columns of rim ``k``'s function (0: outer, 1: inner)."""
        return self.inner_columns if k == 1 else ~self.inner_columns

    def rim_search_size(self) -> int:
        """``max(720, 16 * n_modes)`` angles per rim: 16 points per shortest wavelength."""
        return int(max(720, 16 * self.n_modes))

    # --- construction ------------------------------------------------------------------------
    def with_modes(self, n_modes: int):
        """Return the same wall with another truncation degree."""
        return replace(self, n_modes=int(n_modes))

    @classmethod
    def from_prior(cls, radius=1.0, center=None, *, s=2.0, n_modes=None, inner_radius=None):
        """Build an annulus whose truncation leaves a negligible share of prior rim variance out.

        Parameters
        ----------
        radius : float, default=1.0
            Outer radius.
        center : sequence of float, optional
        s : float, default=2.0
        n_modes : int, optional
        inner_radius : float, optional
            Bore radius; default half the outer radius.

        Returns
        -------
        Annulus
        """
        if inner_radius is None:
            inner_radius = 0.5 * radius
        center = (0.0, 0.0) if center is None else tuple(center)
        if len(center) != 2:
            raise ValueError(f"The 'center' of an annulus must have 2 coordinates. Got {center}.")
        cls.check_smoothness(s)
        if n_modes is None:
            probe = cls(radius, inner_radius, center, 0)
            n_modes = truncation_degree(probe, s, tol=probe.truncation_rule()[0],
                                        maximum=cls.initial_max_degree)
        return cls(radius, inner_radius, center, n_modes)

    def describe(self) -> dict:
        """Plain description for summaries: the disk's keys plus ``inner_radius``."""
        out = super().describe()
        out["inner_radius"] = self.inner_radius
        return out

    # --- positions -----------------------------------------------------------------------------
    def _w(self, points) -> np.ndarray:
        p = np.asarray(points, dtype=float)
        if p.ndim != 2 or p.shape[1] != 2:
            raise ValueError(f"points must have shape (n_points, 2). Got {p.shape} instead.")
        return ((p[:, 0] - self.center[0]) + 1j * (p[:, 1] - self.center[1])) / self.radius

    def rim_tolerance(self, tol=RIM_TOLERANCE) -> float:
        """Tolerance actually used: ``tol`` capped at a quarter of the wall and ``a/(2b)``."""
        return float(min(tol, 0.25 * (1.0 - self.alpha), 0.5 * self.alpha))

    def locate(self, points, *, tol: float = RIM_TOLERANCE):
        """Scaled complex position of each point, snapping near-rim points onto the rims.

        Parameters
        ----------
        points : array_like of shape (n_points, 2)
        tol : float, default=RIM_TOLERANCE
            In units of the outer radius (see :meth:`rim_tolerance`). Points within it of a rim
            are reported as rim points; those beyond the rim (outside the wall or inside the
            bore) are moved radially onto it.

        Returns
        -------
        w : ndarray of complex, shape (n_points,)
            ``(z - c) / b`` after snapping.
        on_rim : ndarray of bool
        n_snapped : int
            Points moved from more than 1e-6 b beyond a rim.

        Raises
        ------
        DomainError
            A point outside the wall or inside the bore by more than the tolerance; ``index``
            names the first one.
        """
        w = self._w(points)
        if not np.all(np.isfinite(w)):
            i = int(np.flatnonzero(~np.isfinite(w))[0])
            raise DomainError(f"point {i} has a non-finite coordinate", i)
        rho, alpha, tol = np.abs(w), self.alpha, self.rim_tolerance(tol)
        bad = np.flatnonzero((rho > 1 + tol) | (rho < alpha - tol))
        if bad.size:
            i = int(bad[0])
            p = np.asarray(points, float)[i]
            where = (f"outside the wall: r = {rho[i] * self.radius:.6g} > outer radius "
                     f"{self.radius:g}" if rho[i] > 1 else
                     f"inside the bore: r = {rho[i] * self.radius:.6g} < inner radius "
                     f"{self.inner_radius:g}")
            raise DomainError(f"point (x, y) = ({p[0]:g}, {p[1]:g}) lies {where}", i)
        scale = np.where(rho > 1, 1.0 / np.where(rho > 0, rho, 1.0), 1.0)
        scale = np.where(rho < alpha, alpha / np.where(rho > 0, rho, 1.0), scale)
        on_rim = (rho >= 1 - tol) | (rho <= alpha + tol)
        n_snapped = int(((rho > 1 + 1e-6) | (rho < alpha - 1e-6)).sum())
        return w * scale, on_rim, n_snapped

    def rotated_design(self, points, angle) -> np.ndarray:
        """Design rows of ``points`` turned about the centre by ``angle`` (radians, ccw).

        ``angle`` has shape (n_batch, m); the rows of turn ``k`` of point ``i`` are at
        ``k * m + i``. Points snapped onto a rim stay on it.
        """
        rho, theta = self.to_polar(points)
        rho = np.clip(rho, self.alpha, 1.0)
        angle = np.asarray(angle, float)
        pts = self.from_polar(np.broadcast_to(rho, angle.shape), theta[None, :] + angle)
        return self.design(pts)

    def source_field(self, points) -> np.ndarray:
        r"""Field of a uniform source with zero values on both rims, 1 at its maximum.

        Notes
        -----
        :math:`q(\rho) = 1 - \rho^2 + C\ln\rho` with :math:`C = (1 - \alpha^2)/\ln(1/\alpha)`
        has :math:`\Delta q = -4/b^2` and vanishes at :math:`\rho = \alpha, 1`; it is divided by
        its maximum, at :math:`\rho^2 = C/2`. The model check tests the readings against it.
        """
        rho = np.asarray(self.relative_radius(points), float)
        C = (1.0 - self.alpha**2) / self.log_ratio

        def q(r):
            return 1.0 - r**2 + C * np.log(r)

        return q(np.clip(rho, self.alpha, 1.0)) / q(np.sqrt(C / 2))

    def reference_points(self):
        """Named points the report summarises: mid-wall at 0 and 180 degrees."""
        mid = 0.5 * (1.0 + self.alpha)
        return (("mid-wall, θ = 0°", self.from_polar(mid, 0.0)[0]),
                ("mid-wall, θ = 180°", self.from_polar(mid, np.pi)[0]))

    # --- design matrices -----------------------------------------------------------------------
    def _logs(self, w):
        # s = ln(r/a), t = ln(b/r) from log1p of the relative distances to each rim (accurate for
        # thin walls), with rho = |w| = r/b.
        rho, alpha = np.abs(w), self.alpha
        return np.log1p((rho - alpha) / alpha), np.log1p((1.0 - rho) / rho), rho

    def _parts(self, w):
        # Radial profile, its r-derivative, angular factor and its theta-derivative per column.
        s, t, rho = self._logs(w)
        L, N = self.log_ratio, self.n_modes
        fo, dfo = radial_profiles(s, t, L, N)
        fi, dfi = radial_profiles(t, s, L, N)
        deg, inner, sine = self.degrees, self.inner_columns, self.sine_columns
        r = rho[:, None] * self.radius
        radial = np.where(inner, fi[:, deg], fo[:, deg])
        # d/dr = (1/r) d/ds for the outer profiles, -(1/r) d/dt for the inner ones
        dradial = np.where(inner, -dfi[:, deg], dfo[:, deg]) / r
        e = w / np.where(rho > 0, rho, 1.0)  # e^{i theta}
        powers = np.cumprod(np.column_stack([np.ones_like(e)] + [e] * N), axis=1) if N else \
            np.ones((e.size, 1), complex)
        z = powers[:, deg]
        ang = np.where(sine, z.imag, z.real)
        dang = deg * np.where(sine, z.real, -z.imag)
        return radial, dradial, ang, dang, e, r

    def design(self, points) -> np.ndarray:
        """Design matrix ``G`` (shape (n_points, n_coef)) with ``G @ c`` the field at points."""
        w, _, _ = self.locate(points)
        out = np.empty((w.size, self.n_coef))
        for k in range(0, w.size, _BLOCK):
            radial, _, ang, _, _, _ = self._parts(w[k:k + _BLOCK])
            out[k:k + _BLOCK] = radial * ang
        return out

    def design_gradient(self, points) -> np.ndarray:
        r"""Linear maps from coefficients to the gradient, shape ``(n_points, 2, n_coef)``.

        :math:`\nabla u = u_r\,\hat r + r^{-1} u_\theta\,\hat\theta`, column by column.
        """
        w, _, _ = self.locate(points)
        radial, dradial, ang, dang, e, r = self._parts(w)
        ur, ut = dradial * ang, radial * dang / r
        c, s = e.real[:, None], e.imag[:, None]
        return np.stack([c * ur - s * ut, s * ur + c * ut], axis=1)

    def design_normal_derivative(self, points) -> np.ndarray:
        r"""Rows mapping coefficients to the radial derivative :math:`\partial u/\partial r`.

        On the outer rim this is the outward normal derivative; on the inner rim the outward
        normal of the wall is :math:`-\hat r` (:meth:`normal_flux` takes the sign into account).
        """
        w, _, _ = self.locate(points)
        _, dradial, ang, _, _, _ = self._parts(w)
        return dradial * ang

    def heat_flow_row(self, conductivity=1.0) -> np.ndarray:
        r"""Row :math:`q` with :math:`Q = q \cdot c`, the net radially outward flow per length.

        Notes
        -----
        Through any circle :math:`a \le r \le b`, :math:`Q = \oint -k\,\partial_r u\, r\,d\theta
        = -2\pi k\,d_0`, only the :math:`\ln r` term contributing; :math:`d_0 = (A_0 - C_0)/L`,
        so :math:`Q = 2\pi k (C_0 - A_0)/\ln(b/a)` (the cylindrical-wall result of [2]_ in the
        module references).
        """
        q = np.zeros(self.n_coef)
        q[0], q[1] = -1.0, 1.0
        return 2 * np.pi * float(conductivity) / self.log_ratio * q

    def _check_coef(self, coef) -> np.ndarray:
        coef = np.asarray(coef, dtype=float)
        if coef.shape[-1] != self.n_coef:
            raise ValueError(f"coef has {coef.shape[-1]} entries, but expected {self.n_coef} for "
                             f"n_modes={self.n_modes}.")
        return coef

    def field(self, coef, points) -> np.ndarray:
        r"""Field values at ``points``.

        Notes
        -----
        With :math:`P_n = (A_n - iB_n)/(1-\alpha^{2n})`, :math:`Q_n = (C_n - iD_n)/(1-
        \alpha^{2n})`, :math:`w = (z-c)/b` and :math:`\zeta = \alpha/\bar w` (both of modulus
        at most 1 in the wall), the profiles' powers combine into two power series,

        .. math:: u = f_0 A_0 + g_0 C_0 + \operatorname{Re}\Big[\sum_n (P_n - \alpha^n Q_n)
                  w^n + \sum_n (Q_n - \alpha^n P_n)\,\zeta^n\Big],

        each summed by Horner's rule. The division by :math:`1-\alpha^{2n}` amplifies rounding
        by about :math:`1/(2\ln(b/a))`, at most 5 for :math:`a/b \le` :data:`HORNER_MAX_RATIO`
        (0.9); thinner walls use the design rows, whose profiles have no such loss.
        """
        coef = self._check_coef(coef)
        if self.alpha > HORNER_MAX_RATIO or not self.n_modes:
            return self.design(points) @ coef
        w, _, _ = self.locate(points)
        s, t, _ = self._logs(w)
        L, alpha, N = self.log_ratio, self.alpha, self.n_modes
        n = np.arange(1, N + 1)
        k = 2 + 4 * (n - 1)
        den = -np.expm1(2 * n * np.log(alpha))  # 1 - alpha^(2n)
        P = (coef[..., k] - 1j * coef[..., k + 1]) / den
        Q = (coef[..., k + 2] - 1j * coef[..., k + 3]) / den
        an = alpha**n
        zeta = alpha / np.conj(w)
        series = _power_series(P - an * Q, w) + _power_series(Q - an * P, zeta)
        return (coef[..., 0] * s + coef[..., 1] * t) / L + series.real

    def gradient(self, coef, points) -> np.ndarray:
        """Gradient of ``u`` at ``points``, shape (n_points, 2)."""
        return self.design_gradient(points) @ self._check_coef(coef)

    def normal_flux(self, coef, points, conductivity=1.0) -> np.ndarray:
        """Outward flux density ``-k du/dn`` through the wall's boundary at rim ``points``.

        On the outer rim the outward normal is radial, on the inner rim it points into the bore
        (a rim point is on the inner rim when it is nearer to it than to the outer one).
        """
        rho = self.relative_radius(points)
        sign = np.where(rho < 0.5 * (1.0 + self.alpha), -1.0, 1.0)
        return -conductivity * sign * (self.design_normal_derivative(points) @ coef)

    # --- grids ---------------------------------------------------------------------------------
    def rim_grid(self, n: int = 360):
        """Points on both rims at ``n`` equally spaced angles each (outer first), with columns.

        Returns
        -------
        points : ndarray of shape (2 n, 2)
        columns : dict
            ``{"rim": "outer" | "inner", "theta_deg": ...}``.
        """
        theta_deg = np.arange(n) * (360.0 / n)
        th = np.deg2rad(theta_deg)
        pts = np.vstack([self.from_polar(1.0, th), self.from_polar(self.alpha, th)])
        rim = np.repeat(np.array(["outer", "inner"], dtype=object), n)
        return pts, {"rim": rim, "theta_deg": np.tile(theta_deg, 2)}

    def polar_grid(self, rho, n_angles: int):
        """Points on rings at relative radii ``rho``, ``n_angles`` angles from 0, ring by ring."""
        th = np.arange(int(n_angles)) * (2 * np.pi / int(n_angles))
        return self.from_polar(np.asarray(rho, float)[:, None], th[None, :])

    def wall_rings(self, n: int = 81):
        """Relative radii and angle count of the polar wall grid matching an ``n`` x ``n`` grid.

        The spacing of an ``n`` x ``n`` grid over the bounding square, ``h = 2b/(n-1)``, is kept
        across the wall (at least 3 rings, both rims included) and along the outer rim.
        """
        h = 2.0 / (max(int(n), 3) - 1)
        n_r = max(3, int(round((1.0 - self.alpha) / h)) + 1)
        n_t = max(16, int(round(2 * np.pi / h)))
        return np.linspace(self.alpha, 1.0, n_r), n_t

    def field_grid(self, n: int = 81):
        """Points of a polar grid of the wall (:meth:`wall_rings`) and their columns x, y."""
        rho, n_t = self.wall_rings(n)
        pts = self.polar_grid(rho, n_t)
        return pts, {"x": pts[:, 0], "y": pts[:, 1]}

