r"""The Domain contract: everything the rest of the package may ask of a region.

A domain is the only object that knows the shape of the region. Stages see only the linear
problem it builds (``design``, ``degrees``, ``eigenvalues``); the prior, diagnostics, report,
advice and outputs ask the domain for what they need through the names listed in
:class:`Domain`, never through its ``kind``. A new region (an annulus, a square) is one new
module here that provides these names, plus one line in :data:`invert.geometry.DOMAINS` and,
for its figures, one entry in :data:`invert.report.figures.FIGURES`.

Optional capabilities are asked for, not assumed: :attr:`Domain.rim_arcs` is ``None`` for a
domain whose rim is not one circle parametrised by an angle, and the gap, depth and rim-profile
diagnostics are then skipped; :meth:`Domain.region_mean_square` returns ``None`` when no closed
form of the region mean of the squared columns is known (advice then averages over a grid).

:class:`RoundDomain` holds what the disk and the ball share (a centre and radius in
:math:`\mathbb R^d`, relative radius, the mean-level columns, the truncation rule and the
construction from a prior's smoothness).
"""

from __future__ import annotations

from typing import Protocol, runtime_checkable

import numpy as np

from ..prior import truncation_degree

__all__ = ["Domain", "RoundDomain", "PlanarPolar"]


@runtime_checkable
class Domain(Protocol):
    """What every domain provides (the contract checked by ``tests/contract/test_domains.py``).

    Attributes
    ----------
    kind : str
        Plain name of the domain, written into ``summary.json``; nothing outside
        :mod:`invert.geometry` may branch on it.
    dim : int
        Dimension of the points (2 for a disk, 3 for a ball).
    radius : float
    center : tuple of float, length ``dim``
    n_modes : int
        Truncation degree.
    n_coef : int
        Number of coefficients (columns of the design).
    degrees : ndarray of int, shape (n_coef,)
        Degree of each column.
    eigenvalues : ndarray of shape (n_coef,)
        Rim Laplace–Beltrami eigenvalue of each column's degree (for the smoothness prior).
    point_columns : tuple of str, length ``dim``
        Names of the point coordinates in output tables (``("x", "y")``, ``("x", "y", "z")``).
    coefficient_names : tuple of str, length ``n_coef``
        One name per column (``a0, a1, b1, ...`` on a disk).
    mean_columns : ndarray of int
        The broad mean-level columns (degree 0), which get a flat prior.
    rim_arcs : object or None
        Angle-based rim tools of a rim that is one circle (rim angles of points, harmonic
        measure of rim arcs, rings at a relative radius); ``None`` otherwise.
    rim_circles : RimCircles or None
        The boundary circles about the centre, named (``rim``; ``outer``, ``inner``), with
        each rim's attenuation with depth (:mod:`invert.geometry.rims`); advice and the per-rim
        diagnostics use it. ``None`` for a ball.
    inner_relative_radius : float
        Relative radius of the inner boundary: 0 when the region reaches its centre (disk,
        ball), ``a/b`` for an annulus, whose ``relative_radius`` is ``r/b`` in ``[a/b, 1]``.

    Optional methods (asked for with ``getattr``): ``rotated_design(points, angle)``, the
    design rows of sensors turned about the centre (the angle-error model of the MCMC stage
    needs it; the disk has it, the ball does not).
    """

    kind: str
    dim: int
    radius: float
    center: tuple
    n_modes: int
    inner_relative_radius: float

    @property
    def n_coef(self) -> int: ...  # noqa: D102

    @property
    def degrees(self) -> np.ndarray: ...  # noqa: D102

    @property
    def eigenvalues(self) -> np.ndarray: ...  # noqa: D102

    @property
    def point_columns(self) -> tuple: ...  # noqa: D102

    @property
    def coefficient_names(self) -> tuple: ...  # noqa: D102

    @property
    def mean_columns(self) -> np.ndarray: ...  # noqa: D102

    @property
    def rim_arcs(self): ...  # noqa: D102

    def degree_multiplicity(self, n):
        """Return the number of columns of degree ``n``."""

    def degree_eigenvalue(self, n):
        """Rim eigenvalue of degree ``n``."""

    def rim_mean_square(self, n):
        """Sum over the columns of degree ``n`` of their mean square over the rim."""

    def truncation_rule(self):
        """``(tol, max_degree)`` for choosing or extending the truncation degree."""

    def with_modes(self, n_modes):
        """Return the same region with another truncation degree."""

    def describe(self) -> dict:
        """Plain description for summaries."""

    def locate(self, points, *, tol=...):
        """Scaled positions, a mask of rim points and the number snapped onto the rim."""

    def relative_radius(self, points) -> np.ndarray:
        """Distance from the centre over the radius, ``rho`` in [0, 1] inside."""

    def design(self, points) -> np.ndarray:
        """Design matrix, shape ``(n_points, n_coef)``."""

    def design_gradient(self, points) -> np.ndarray:
        """Gradient rows, shape ``(n_points, dim, n_coef)``."""

    def design_normal_derivative(self, points) -> np.ndarray:
        """Rows of the radial (on the rim: outward normal) derivative at ``points``."""

    def field(self, coef, points) -> np.ndarray:
        """Field values at ``points``."""

    def gradient(self, coef, points) -> np.ndarray:
        """Field gradient at ``points``, shape ``(n_points, dim)``."""

    def normal_flux(self, coef, points, conductivity=1.0) -> np.ndarray:
        """Outward flux density ``-k du/dn`` at rim ``points``."""

    def rim_grid(self, n=360):
        """Rim points and their output table columns."""

    def field_grid(self, n=81):
        """Interior points and their output table columns."""

    def rim_search_size(self) -> int:
        """Return the ``rim_grid`` argument fine enough to find a field's maximum on the rim."""

    def region_mean_square(self):
        """Region mean of the squared columns: its diagonal, a full matrix, or None."""

    def source_field(self, points) -> np.ndarray:
        """Field of a uniform source with zero values on every rim, 1 at its maximum."""

    def reference_points(self):
        """``((name, point), ...)``: points summarised in the report (the disk's centre)."""


class RoundDomain:
    """What a disk and a ball share: a region ``|x - center| <= radius`` in ``dim`` dimensions.

    Subclasses are frozen dataclasses with fields ``radius``, ``center``, ``n_modes`` and set the
    class attributes ``kind``, ``dim``, ``truncation_tol`` (omitted share of prior rim variance
    accepted by :func:`invert.prior.truncation_degree`), ``max_degree`` (cap when a stage extends
    the truncation) and ``initial_max_degree`` (cap when :meth:`from_prior` chooses it).
    """

    kind: str = ""
    dim: int = 0
    #: Relative radius of the inner boundary: 0 for a region that reaches its centre (an annulus
    #: has its bore's a/b); points of the region have relative radius in [this, 1].
    inner_relative_radius: float = 0.0
    truncation_tol: float = 1e-4
    max_degree: int = 128
    initial_max_degree: int = 256

    # --- basis bookkeeping shared by every degree-ordered basis --------------------------------
    @property
    def eigenvalues(self) -> np.ndarray:
        """Rim eigenvalue of each column, ``degree_eigenvalue(degrees)``."""
        return self.degree_eigenvalue(self.degrees)

    @property
    def mean_columns(self) -> np.ndarray:
        """Indices of the mean-level (degree-0) columns."""
        return np.flatnonzero(np.asarray(self.degrees) == 0)

    @property
    def point_columns(self) -> tuple:
        """Names of the point coordinates in output tables: ``x, y`` (and ``z``)."""
        return ("x", "y", "z")[: self.dim]

    def truncation_rule(self):
        """``(tol, max_degree)`` used when a stage extends the truncation degree.

        ``tol`` is the omitted share of prior rim variance accepted by
        :func:`invert.prior.truncation_degree`; ``max_degree`` caps the extension.
        """
        return self.truncation_tol, self.max_degree

    def rim_search_size(self) -> int:
        """``rim_grid`` argument used to find the maximum of a field on the rim (default 360)."""
        return 360

    def region_mean_square(self):
        """None: no closed form of the region mean of the squared columns (a grid is used)."""
        return None

    @property
    def rim_arcs(self):
        """None: the rim is not a circle parametrised by one angle (no arc diagnostics)."""
        return None

    @property
    def rim_circles(self):
        """None: the boundary is not made of circles about the centre (no sensor advice)."""
        return None

    def source_field(self, points) -> np.ndarray:
        r"""Field of a uniform source with zero rim values, 1 at its maximum: :math:`1-\rho^2`.

        The model check tests the readings against this direction.
        """
        return 1.0 - self.relative_radius(points) ** 2

    def reference_points(self):
        """Named points the report summarises besides the query points: the centre."""
        return (("centre", np.asarray(self.center, float)),)

    # --- geometry ------------------------------------------------------------------------------
    def with_modes(self, n_modes: int):
        """Return the same region with another truncation degree (same class: subclasses stay)."""
        return type(self)(self.radius, self.center, n_modes)

    def describe(self) -> dict:
        """Plain description for summaries (``basis`` added by domains that describe theirs)."""
        out = {"domain": self.kind, "radius": self.radius, "center": list(self.center),
               "n_modes": self.n_modes, "n_coefficients": self.n_coef}
        basis = getattr(self, "basis_description", None)
        if basis:
            out["basis"] = basis
        return out

    def relative_radius(self, points) -> np.ndarray:
        r"""Relative radius :math:`\rho = |x - c|/R` of each point (no snapping or checks).

        Parameters
        ----------
        points : array_like of shape (n_points, dim)

        Returns
        -------
        ndarray of shape (n_points,)
        """
        p = np.asarray(points, float)
        return np.linalg.norm(p - np.asarray(self.center, float)[None, :], axis=1) / self.radius

    # --- construction from a prior ------------------------------------------------------------
    @classmethod
    def check_smoothness(cls, s):
        """Raise ``ValueError`` when the prior's ``s`` gives no finite rim point variance."""

    @classmethod
    def from_prior(cls, radius=1.0, center=None, *, s=2.0, n_modes=None, **shape):
        """Build a domain whose truncation leaves a negligible share of prior rim variance out.

        Parameters
        ----------
        radius : float, default=1.0
        center : sequence of float, optional
            ``dim`` coordinates; default the origin.
        s : float, default=2.0
            Smoothness order of the prior (:func:`invert.prior.truncation_degree`).
        n_modes : int, optional
            Force the truncation degree.
        **shape
            Shape parameters of other domains (an annulus's ``inner_radius``): refused with a
            ``ValueError`` naming the parameter, since a disk or ball has none.

        Returns
        -------
        RoundDomain
        """
        if shape:
            name = sorted(shape)[0]
            raise ValueError(f"The '{name}' parameter does not apply to a {cls.kind}.")
        cls.check_smoothness(s)
        center = (0.0,) * cls.dim if center is None else tuple(center)
        if len(center) != cls.dim:
            raise ValueError(f"The 'center' of a {cls.kind} must have {cls.dim} coordinates. "
                             f"Got {center}.")
        if n_modes is None:
            probe = cls(radius, center, 0)
            n_modes = truncation_degree(probe, s, tol=probe.truncation_rule()[0],
                                        maximum=cls.initial_max_degree)
        return cls(radius, center, n_modes)


class PlanarPolar:
    """Polar coordinates of a plane region about ``center``, relative to ``radius``.

    Shared by the disk and the annulus; the class provides ``_w(points)``, the complex position
    ``(z - center) / radius``.
    """

    def to_polar(self, points):
        """Return ``(rho, theta)``: radius relative to ``radius`` and polar angle in radians."""
        w = self._w(points)
        return np.abs(w), np.angle(w)

    def from_polar(self, rho, theta):
        """Points of shape (n, 2) at relative radius ``rho`` and angle ``theta`` (radians)."""
        rho, theta = np.broadcast_arrays(np.asarray(rho, float), np.asarray(theta, float))
        x = self.center[0] + self.radius * rho * np.cos(theta)
        y = self.center[1] + self.radius * rho * np.sin(theta)
        return np.column_stack([x.ravel(), y.ravel()])
