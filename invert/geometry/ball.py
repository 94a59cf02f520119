r"""The ball in three dimensions: real solid spherical harmonics and the Poisson kernel.

:class:`Ball` provides the :class:`~invert.geometry.base.Domain` contract, so the linear
problem, every stage and every output work on it unchanged; it has no ``rim_arcs`` (the sphere
is not parametrised by one angle), so the gap and depth diagnostics are skipped. The "rim" is
the sphere :math:`|x - c| = R`. This module depends on NumPy and SciPy only.

Notes
-----
With :math:`\xi = (x - c)/R`, :math:`\rho = |\xi|`, polar angle :math:`\vartheta` (from
:math:`+z`) and azimuth :math:`\varphi` (counter-clockwise from :math:`+x` about :math:`+z`),

.. math:: u(x) = \sum_{\ell=0}^{L} \sum_{m=-\ell}^{\ell} c_{\ell m}\, \rho^\ell\,
          B_{\ell m}(\vartheta, \varphi),\qquad B_{\ell m} = \sqrt{4\pi}\, Y_{\ell m},

where :math:`Y_{\ell m}` are the *real* spherical harmonics, orthonormal on the unit sphere,
made from the complex ones :math:`Y_\ell^m` of :func:`scipy.special.sph_harm_y` (degree first,
:math:`\vartheta` = polar angle, Condon–Shortley phase included):

.. math:: Y_{\ell m} = \begin{cases}
          \sqrt2 (-1)^m \operatorname{Re} Y_\ell^m & m > 0\\
          Y_\ell^0 & m = 0\\
          \sqrt2 (-1)^m \operatorname{Im} Y_\ell^{|m|} & m < 0.\end{cases}

so that :math:`Y_{1,1} = \sqrt{3/4\pi}\,x/r` and :math:`Y_{1,-1} = \sqrt{3/4\pi}\,y/r`.

**Normalisation.** The design columns :math:`\rho^\ell B_{\ell m}` carry the factor
:math:`\sqrt{4\pi}`: they are orthonormal under the *mean* over the sphere,
:math:`\frac{1}{4\pi}\oint B_{\ell m} B_{\ell' m'}\,d\Omega = \delta_{\ell\ell'}\delta_{mm'}`.
The constant column is therefore **1** (not :math:`Y_{00} = 1/(2\sqrt\pi)`), exactly as on the
disk: :math:`c_{00}` is the mean level, and by the mean-value property
:math:`u(c) = c_{00}` = the mean of the surface values. With this scaling the addition theorem
gives :math:`\sum_m B_{\ell m}(\hat x)^2 = 2\ell+1`, the multiplicity of degree :math:`\ell`, so
a prior with variance :math:`\tau^2(1+\ell(\ell+1))^{-s}` per coefficient has surface point
variance :math:`\tau^2\sum_\ell (2\ell+1)(1+\ell(\ell+1))^{-s}` and :math:`\tau` means the same
as on the disk.

Columns are in the usual single-index order :math:`j = \ell^2 + \ell + m` (degree by degree,
:math:`m = -\ell,\ldots,\ell`); ``degrees`` gives :math:`\ell` and ``orders`` gives :math:`m` of
each column. Degree :math:`\ell` has Laplace–Beltrami eigenvalue :math:`\ell(\ell+1)` on the
unit sphere, which the smoothness prior uses.

Gradients use the ladder relations of the regular solid harmonics
:math:`R_\ell^m = \sqrt{4\pi/(2\ell+1)}\,r^\ell Y_\ell^m` (checked against finite differences
in the tests):

.. math::
   \partial_z R_\ell^m = \sqrt{(\ell+m)(\ell-m)}\,R_{\ell-1}^m,\quad
   (\partial_x + i\partial_y) R_\ell^m = \sqrt{(\ell-m)(\ell-m-1)}\,R_{\ell-1}^{m+1},\quad
   (\partial_x - i\partial_y) R_\ell^m = -\sqrt{(\ell+m)(\ell+m-1)}\,R_{\ell-1}^{m-1},

which hold everywhere, including the centre and the poles.

References
----------
.. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., AMS, 2010, §2.2.4 (Poisson
       kernel of the ball, mean-value property).
.. [2] S. Axler, P. Bourdon and W. Ramey, *Harmonic Function Theory*, 2nd ed., Springer, 2001,
       ch. 1 and 5. doi:10.1007/978-1-4757-8137-3
.. [3] NIST Digital Library of Mathematical Functions, §14.30 (spherical harmonics, addition
       theorem). https://dlmf.nist.gov/14.30
.. [4] T. Helgaker, P. Jørgensen and J. Olsen, *Molecular Electronic-Structure Theory*, Wiley,
       2000, §6.4 (solid harmonics and their derivatives). doi:10.1002/9781119019572
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

from ..errors import DomainError
from .base import RoundDomain
from .disk import RIM_TOLERANCE
from .sphere_grids import SphereGrids
from .spherical import ball_poisson_kernel, poisson_kernel_nd, real_sph_harm

__all__ = [
    "Ball",
    "ball_poisson_kernel",
    "poisson_kernel_nd",
    "real_sph_harm",
    "BALL_TRUNCATION_TOL",
    "BALL_MAX_DEGREE",
]

#: Omitted share of the prior surface variance accepted when the truncation degree of a ball is
#: chosen from the smoothness (:func:`invert.prior.truncation_degree`). On the sphere the tail
#: of :math:`\sum_\ell (2\ell+1)(1+\ell(\ell+1))^{-s}` decays only like :math:`L^{2-2s}`, so the
#: disk's 1e-4 would ask for L = 136 (18 769 columns) at s = 2. 3e-3 is met at L = 24 for the
#: default s = 2 (exactly the cap below, so the default prior is not cut short), L = 9 for
#: s = 2.5 and the minimum 8 for s >= 3; the prior surface sd is then low by 0.15 %.
BALL_TRUNCATION_TOL = 3e-3

#: Cap on the truncation degree of a ball: (24 + 1)^2 = 625 columns, which keeps the posterior
#: covariance and grid evaluations cheap. Surface sensors see the whole omitted tail, so fits
#: converge slowly in L: in seeded shell scenarios (about 35 sensors, s = 2, truth of degree 40)
#: going from L = 24 to L = 32 moved interior means by <= 0.02 posterior sd and sds by <= 1.7 %
#: (tests/test_ball.py), against up to 0.2 sd and 5 % between L = 20 and L = 44. Force a larger
#: ``n_modes`` when the readings are very precise.
BALL_MAX_DEGREE = 24

#: Points are evaluated in blocks of this many rows (a block of the complex harmonics table has
#: (L+1)(2L+1) rows).
_BLOCK = 2048


@dataclass(frozen=True)
class Ball(SphereGrids, RoundDomain):
    r"""A ball of radius ``radius`` centred at ``center``, with harmonics up to degree ``n_modes``.

    Parameters
    ----------
    radius : float, default=1.0
        Radius :math:`R`, in the unit of the sensor coordinates.
    center : tuple of 3 floats, default=(0.0, 0.0, 0.0)
        Centre :math:`c`; points are given in the same frame.
    n_modes : int, default=16
        Highest degree :math:`L`; the basis has ``(n_modes + 1)**2`` columns.

    Notes
    -----
    Column :math:`j = \ell^2+\ell+m` is :math:`\rho^\ell B_{\ell m}` with
    :math:`B_{\ell m} = \sqrt{4\pi}\,Y_{\ell m}` (see the module notes): orthonormal under the
    mean over the sphere, constant column 1, so ``coef[0]`` is the surface mean and the centre
    value. The truncation chosen by :meth:`from_prior` (and so by
    :func:`invert.workflow.make_domain` for ``kind="ball"``) uses :data:`BALL_TRUNCATION_TOL`
    and :data:`BALL_MAX_DEGREE` (:meth:`truncation_rule`).

    Examples
    --------
    >>> b = Ball(radius=2.0, n_modes=1)
    >>> b.design([[0.0, 0.0, 0.0], [2.0, 0.0, 0.0]]).round(6)  # columns 1, y, z, x (scaled)
    array([[1.      , 0.      , 0.      , 0.      ],
           [1.      , 0.      , 0.      , 1.732051]])
    """

    radius: float = 1.0
    center: tuple[float, float, float] = (0.0, 0.0, 0.0)
    n_modes: int = 16

    dim = 3
    kind = "ball"
    #: Truncation rule (:meth:`truncation_rule`): see :data:`BALL_TRUNCATION_TOL` and
    #: :data:`BALL_MAX_DEGREE` (the same cap at construction and extension).
    truncation_tol = BALL_TRUNCATION_TOL
    max_degree = BALL_MAX_DEGREE
    initial_max_degree = BALL_MAX_DEGREE

    def __post_init__(self):
        if not (np.isfinite(self.radius) and self.radius > 0):
            raise ValueError(f"The 'radius' of Ball must be a positive number. Got {self.radius}.")
        if int(self.n_modes) != self.n_modes or self.n_modes < 0:
            raise ValueError(f"The 'n_modes' of Ball must be an integer >= 0. Got {self.n_modes}.")
        center = tuple(float(v) for v in self.center)
        if len(center) != 3 or not all(np.isfinite(center)):
            raise ValueError(f"The 'center' of Ball must be 3 finite numbers. Got {self.center}.")
        object.__setattr__(self, "center", center)
        object.__setattr__(self, "n_modes", int(self.n_modes))

    # --- basis bookkeeping -------------------------------------------------------------------
    @property
    def n_coef(self) -> int:
        """Number of coefficients, ``(n_modes + 1)**2``."""
        return (self.n_modes + 1) ** 2

    @property
    def degrees(self) -> np.ndarray:
        r"""Degree :math:`\ell` of each column, shape ``(n_coef,)``."""
        return np.repeat(np.arange(self.n_modes + 1), 2 * np.arange(self.n_modes + 1) + 1)

    @property
    def orders(self) -> np.ndarray:
        """Order ``m`` of each column, shape ``(n_coef,)``."""
        return np.concatenate([np.arange(-ell, ell + 1) for ell in range(self.n_modes + 1)])

    @property
    def eigenvalues(self) -> np.ndarray:
        r"""Laplace–Beltrami eigenvalue :math:`\ell(\ell+1)` on the unit sphere of each column."""
        return self.degree_eigenvalue(self.degrees)

    @staticmethod
    def degree_multiplicity(n):
        """Return the number of basis functions of degree ``n``: ``2 n + 1``."""
        return 2 * np.asarray(n) + 1

    @staticmethod
    def degree_eigenvalue(n):
        """Laplace–Beltrami eigenvalue of degree ``n`` on the unit sphere, ``n (n + 1)``."""
        n = np.asarray(n, dtype=float)
        return n * (n + 1)

    @staticmethod
    def rim_mean_square(n):
        """Return the rim mean square of the columns of degree ``n``.

        Sum over the columns of degree ``n`` of their mean square on the sphere: ``2 n + 1``
        (the columns are orthonormal under the surface mean).
        """
        return Ball.degree_multiplicity(n) * 1.0

    @property
    def coefficient_names(self) -> tuple:
        """``c_l_m`` for column ``l**2 + l + m``: ``("c_0_0", "c_1_-1", "c_1_0", ...)``."""
        return tuple(f"c_{ell}_{m}" for ell, m in zip(self.degrees, self.orders))

    @classmethod
    def check_smoothness(cls, s):
        r"""Check that the prior's ``s`` gives a finite rim point variance.

        Raise ``ValueError`` unless ``s > 1`` (finite pointwise prior variance on the sphere:
        the tail of :math:`\sum (2\ell+1)(1+\ell(\ell+1))^{-s}` diverges for ``s <= 1``).
        """
        if not s > 1:
            raise ValueError(f"The 's' parameter must be > 1 for a ball (finite pointwise prior "
                             f"variance on the sphere). Got {s!r} instead.")

    #: Basis, as summaries describe it.
    basis_description = ("rho^l * sqrt(4 pi) * real spherical harmonic Y_lm, column l^2 + l + m; "
                     "orthonormal under the surface mean, constant column 1")

    # --- geometry ------------------------------------------------------------------------------
    def _xi(self, points) -> np.ndarray:
        p = np.asarray(points, dtype=float)
        if p.ndim != 2 or p.shape[1] != 3:
            raise ValueError(f"points must have shape (n_points, 3). Got {p.shape} instead.")
        return (p - np.asarray(self.center)) / self.radius

    def locate(self, points, *, tol: float = RIM_TOLERANCE):
        """Scaled position of each point, snapping near-surface points onto the sphere.

        Parameters
        ----------
        points : array_like of shape (n_points, 3)
        tol : float, default=RIM_TOLERANCE
            Points with ``1 < r/R <= 1 + tol`` are moved radially onto the sphere; points with
            ``1 - tol <= r/R <= 1`` are also reported as surface ("rim") points.

        Returns
        -------
        xi : ndarray of shape (n_points, 3)
            ``(x - c) / R`` after snapping.
        on_rim : ndarray of bool
            Points taken to lie on the sphere.
        n_snapped : int
            How many points were moved onto the sphere from more than 1e-6 R outside it.

        Raises
        ------
        DomainError
            If a point lies farther outside than the tolerance; ``index`` names the first one.
        """
        xi = self._xi(points)
        bad = ~np.all(np.isfinite(xi), axis=1)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise DomainError(f"point {i} has a non-finite coordinate", i)
        rho = np.linalg.norm(xi, axis=1)
        outside = rho > 1 + tol
        if outside.any():
            i = int(np.flatnonzero(outside)[0])
            p = np.asarray(points, dtype=float)[i]
            raise DomainError(
                f"point ({p[0]:g}, {p[1]:g}, {p[2]:g}) lies outside the ball: "
                f"r/R = {rho[i]:.6g} > 1",
                i,
            )
        snap = rho > 1
        xi = np.where(snap[:, None], xi / np.where(snap, rho, 1.0)[:, None], xi)
        on_rim = rho >= 1 - tol
        return xi, on_rim, int((rho > 1 + 1e-6).sum())

    def to_spherical(self, points):
        """Return spherical coordinates of points.

        Return ``(rho, polar, azimuth)``: radius relative to ``R``, polar angle from ``+z``
        and azimuth counter-clockwise from ``+x``, in radians (no snapping or checks).
        """
        return _spherical(self._xi(points))

    def from_spherical(self, rho, polar, azimuth):
        """Return points at given spherical coordinates.

        Points of shape (n, 3) at relative radius ``rho`` and angles ``polar``, ``azimuth``
        (radians).
        """
        rho, polar, azimuth = np.broadcast_arrays(*(np.asarray(a, float)
                                                    for a in (rho, polar, azimuth)))
        s = np.sin(polar)
        xi = np.column_stack([(rho * s * np.cos(azimuth)).ravel(),
                              (rho * s * np.sin(azimuth)).ravel(),
                              (rho * np.cos(polar)).ravel()])
        return np.asarray(self.center) + self.radius * xi

    def from_latlon(self, lat_deg, lon_deg, rho=1.0):
        """Points at latitude/longitude (degrees; latitude = 90 - polar angle) and ``rho``."""
        return self.from_spherical(rho, np.deg2rad(90.0 - np.asarray(lat_deg, float)),
                                   np.deg2rad(lon_deg))

    # --- design matrices -------------------------------------------------------------------
    def _solid(self, xi, n_modes=None, *, negative=True) -> np.ndarray:
        r"""Return the complex solid harmonics of scaled points.

        Complex solid harmonics :math:`\sqrt{4\pi}\rho^\ell Y_\ell^m`, shape
        ``(L+1, 2L+1, n)``; order ``m`` sits at index ``m`` (negative ``m`` from the end).
        With ``negative=False`` only the orders ``m >= 0`` are kept, shape ``(L+1, L+1, n)``.
        """
        L = self.n_modes if n_modes is None else n_modes
        rho, polar, azimuth = _spherical(xi)
        Y = special.sph_harm_y_all(L, L, polar, azimuth)
        if not negative:
            Y = Y[:, : L + 1]
        powers = np.sqrt(4 * np.pi) * rho[None, :] ** np.arange(L + 1)[:, None]  # 0**0 = 1
        return Y * powers[:, None, :]

    def _real_columns(self, Z) -> np.ndarray:
        """Real columns (n, n_coef) from a complex table ``Z[l, m, n]`` (m >= 0 used)."""
        ell, m = self.degrees, self.orders
        Zc = Z[ell, np.abs(m)]  # (n_coef, n)
        sign = np.where(m % 2 == 0, 1.0, -1.0)[:, None]
        G = np.where((m > 0)[:, None], np.sqrt(2) * sign * Zc.real,
                     np.where((m < 0)[:, None], np.sqrt(2) * sign * Zc.imag, Zc.real))
        return G.T + 0.0  # + 0.0 turns the -0.0 of sign * 0 into 0.0

    def _design_xi(self, xi) -> np.ndarray:
        return self._real_columns(self._solid(xi, negative=False))

    def design(self, points) -> np.ndarray:
        r"""Design matrix :math:`G` with ``G @ c`` = field values at ``points``.

        Parameters
        ----------
        points : array_like of shape (n_points, 3)
            Points inside or on the sphere (within :data:`~invert.geometry.disk.RIM_TOLERANCE`).

        Returns
        -------
        ndarray of shape (n_points, n_coef)
        """
        xi, _, _ = self.locate(points)
        G = np.empty((len(xi), self.n_coef))
        for start in range(0, len(xi), _BLOCK):
            sl = slice(start, start + _BLOCK)
            G[sl] = self._design_xi(xi[sl])
        return G

    def _gradient_xi(self, xi) -> np.ndarray:
        # Complex gradients of Z_l^m = sqrt(4 pi) rho^l Y_l^m (m >= 0, all that _real_columns
        # reads) from the ladder relations of the module notes; for Z = sqrt(2l+1) R_l^m the
        # coefficients gain kappa_l = sqrt((2l+1)/(2l-1)). Units of 1/R until the last line.
        L = self.n_modes
        n = len(xi)
        if L == 0:
            return np.zeros((n, 3, 1))
        Zlow = self._solid(xi, L - 1)  # degrees 0..L-1, orders -(L-1)..L-1 (wrapped)
        ell = np.arange(L + 1)[:, None]
        mm = np.arange(L + 1)[None, :]
        kappa = np.sqrt((2 * ell + 1) / np.maximum(2 * ell - 1, 1))

        def lower(m_new):
            # Z_{l-1}^{m_new} for every (l, m); zero where |m_new| > l - 1 (incl. l = 0).
            ok = (mm <= ell) & (np.abs(m_new) <= ell - 1)
            out = Zlow[np.clip(ell - 1, 0, L - 1), np.clip(m_new, -(L - 1), L - 1)]
            return np.where(ok[..., None], out, 0.0)

        cz = kappa * np.sqrt(np.clip((ell + mm) * (ell - mm), 0, None))
        cp = kappa * np.sqrt(np.clip((ell - mm) * (ell - mm - 1), 0, None))
        cm = -kappa * np.sqrt(np.clip((ell + mm) * (ell + mm - 1), 0, None))
        dplus = cp[..., None] * lower(mm + 1)  # (d_x + i d_y) Z_l^m
        dminus = cm[..., None] * lower(mm - 1)  # (d_x - i d_y) Z_l^m
        D = np.empty((n, 3, self.n_coef))
        D[:, 0, :] = self._real_columns(0.5 * (dplus + dminus))
        D[:, 1, :] = self._real_columns((dplus - dminus) / 2j)
        D[:, 2, :] = self._real_columns(cz[..., None] * lower(mm))
        return D / self.radius

    def design_gradient(self, points) -> np.ndarray:
        r"""Linear maps from coefficients to the gradient, shape ``(n_points, 3, n_coef)``.

        Notes
        -----
        Built from the ladder relations of the solid harmonics (module notes), which need the
        degree-:math:`(\ell-1)` harmonics only and have no singularity at the centre or on the
        polar axis. Units: field per unit length.
        """
        xi, _, _ = self.locate(points)
        D = np.empty((len(xi), 3, self.n_coef))
        for start in range(0, len(xi), _BLOCK):
            sl = slice(start, start + _BLOCK)
            D[sl] = self._gradient_xi(xi[sl])
        return D

    def design_normal_derivative(self, points) -> np.ndarray:
        r"""Return rows mapping coefficients to the radial derivative.

        Rows mapping coefficients to the radial derivative :math:`\partial u/\partial r` at
        ``points`` (off the centre, where the direction is undefined and the rows are NaN).

        On the sphere this is :math:`\sum (\ell/R)\,c_{\ell m} B_{\ell m}`; it is computed as
        the gradient rows projected on :math:`\hat\xi = \xi/\rho`.
        """
        xi, _, _ = self.locate(points)
        rho = np.linalg.norm(xi, axis=1)
        unit = xi / np.where(rho > 0, rho, np.nan)[:, None]
        return np.einsum("nkj,nk->nj", self.design_gradient(points), unit)

    # --- fast evaluation -------------------------------------------------------------------
    def _check_coef(self, coef) -> np.ndarray:
        coef = np.asarray(coef, dtype=float)
        if coef.shape[-1] != self.n_coef:
            raise ValueError(
                f"coef has {coef.shape[-1]} entries, but expected {self.n_coef} for n_modes="
                f"{self.n_modes}."
            )
        return coef

    def field(self, coef, points) -> np.ndarray:
        """Return the field values at points.

        Field values ``u`` at ``points`` for ``coef`` of shape ``(n_coef,)`` (or a stack
        ``(..., n_coef)``, giving ``(..., n_points)``), evaluated in blocks of points.
        """
        coef = self._check_coef(coef)
        xi, _, _ = self.locate(points)
        out = np.empty(coef.shape[:-1] + (len(xi),))
        for start in range(0, len(xi), _BLOCK):
            sl = slice(start, start + _BLOCK)
            out[..., sl] = coef @ self._design_xi(xi[sl]).T
        return out

    def gradient(self, coef, points) -> np.ndarray:
        """Gradient of ``u`` at ``points``, shape (n_points, 3), in field per unit length."""
        coef = self._check_coef(coef)
        if coef.ndim != 1:
            raise ValueError(f"coef must have shape ({self.n_coef},). Got {coef.shape} instead.")
        xi, _, _ = self.locate(points)
        out = np.empty((len(xi), 3))
        for start in range(0, len(xi), _BLOCK):
            sl = slice(start, start + _BLOCK)
            out[sl] = self._gradient_xi(xi[sl]) @ coef
        return out

    def normal_flux(self, coef, points, conductivity=1.0) -> np.ndarray:
        """Outward flux density ``-k du/dr`` through the sphere at surface ``points``."""
        return -conductivity * self.design_normal_derivative(points) @ self._check_coef(coef)


def _spherical(xi):
    """``(rho, polar, azimuth)`` of scaled points; angles are 0 at the centre."""
    x, y, z = xi[:, 0], xi[:, 1], xi[:, 2]
    h = np.hypot(x, y)
    return np.hypot(h, z), np.arctan2(h, z), np.arctan2(y, x)
