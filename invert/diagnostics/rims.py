r"""Per-rim diagnostics for a region with several rim circles (an annulus): gaps and depth.

A region bounded by more than one circle (the domain's ``rim_circles``; an annulus has the
outer and the inner rim) is sensed rim by rim. For each rim this module reports the arcs no
working sensor on that rim covers (:func:`rim_unsensed_arcs`, the disk's rule applied to the
rim's own sensors), how much the estimate at chosen points rests on them (the harmonic measure
of those arcs, :func:`rim_arc_measure`), and the depth of information from the rim: the
posterior-to-prior variance ratio of that rim function's harmonics and the highest degree a
ring of the sensors resolves at each depth (:func:`rim_resolved_degree`). Everything is asked of
``rim_circles`` and the domain's design, never the domain's kind.

Notes
-----
The value at :math:`z` is :math:`\sum_k \oint P_k(z,\varphi) f_k(\varphi)\,d\varphi` with
:math:`P_k` the Poisson kernel of the region for rim :math:`k`; the share over arcs
:math:`E \subset` rim :math:`k` is the harmonic measure :math:`\omega_k(z, E) = \int_E
P_k(z,\varphi)\,d\varphi`, the field whose rim-:math:`k` function is the indicator of
:math:`E` and whose other rim functions vanish [1]_. It is summed here from the indicator's
Fourier series (:func:`~invert.geometry.arcs.arc_fourier_coefficients`) through the domain's
basis at degree :data:`MEASURE_DEGREE`: rim :math:`k`'s harmonic :math:`n` decays into the
region like its attenuation (:math:`(r/b)^n`-like away from the outer rim), so the truncation
error at a point a relative distance :math:`\delta` from the rim is about
:math:`e^{-N\delta}/N`, below 1e-4 for :math:`\delta \ge 0.03` (points nearer a rim are
dominated by that rim's nearest sensors anyway).

References
----------
.. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, Cambridge University Press, 2005,
       ch. I. doi:10.1017/CBO9780511546617
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..geometry.arcs import arc_fourier_coefficients
from .depth import prior_variances
from .gaps import arcs_from_angles

__all__ = ["RimDiagnostics", "rim_unsensed_arcs", "rim_arc_measure", "rim_resolved_degree",
           "rim_diagnostics", "DEPTH_FRACTIONS", "MEASURE_DEGREE"]

#: Depths at which the resolved degree from each rim is reported, as fractions of the wall.
DEPTH_FRACTIONS = (0.0, 0.1, 0.25, 0.5, 0.75, 1.0)

#: Degree of the Fourier series of an arc indicator summed for the harmonic measure.
MEASURE_DEGREE = 256


def rim_unsensed_arcs(problem, k) -> np.ndarray:
    """Arcs of rim ``k`` farther than half a sensor spacing from every working sensor on it.

    The disk's rule (:func:`~invert.diagnostics.gaps.unsensed_arcs`) applied to the sensors
    on rim ``k`` alone; the whole rim ``(0, 2*pi)`` when no working sensor is on it.
    """
    circles = problem.domain.rim_circles
    work = circles.rim_angles(problem.points, k)
    every = np.concatenate([work, circles.rim_angles(problem.gap_points, k)])
    return arcs_from_angles(work, every, max(int(problem.domain.n_modes), 1))


def rim_arc_measure(domain, k, points, arcs) -> np.ndarray:
    """Harmonic measure at ``points`` of the union of ccw ``arcs`` (radians) on rim ``k``.

    See the module notes; clipped to [0, 1].
    """
    arcs = np.asarray(arcs, float).reshape(-1, 2)
    pts = np.asarray(points, float)
    if not len(arcs) or not len(pts):
        return np.zeros(len(pts))
    fine = domain.with_modes(MEASURE_DEGREE)
    coef = np.zeros(fine.n_coef)
    mask = fine.rim_circles.rim_columns(k)
    ind = sum(arc_fourier_coefficients(a, b, MEASURE_DEGREE) for a, b in arcs)
    coef[mask] = ind  # the rim's columns in order a0, a1, b1, ... like the indicator's series
    return np.clip(fine.field(coef, pts), 0.0, 1.0)


def rim_resolved_degree(estimate, k, rho, *, n_readings, noise_sd=None) -> np.ndarray:
    r"""Highest degree of rim ``k``'s function that a ring of sensors at ``rho`` resolves.

    Largest :math:`n` with :math:`A_k(\rho, n)^2 v_n M/(2\sigma^2) \ge 1`, where
    :math:`A_k` is the rim's attenuation (``rim_circles.attenuation``; :math:`\rho^n` on a
    disk, where this is :func:`~invert.diagnostics.depth.resolved_degree`) and :math:`v_n`
    the prior variance of the rim function's degree-:math:`n` columns; 0 if none.
    """
    d = estimate.domain
    sigma = float(estimate.noise_sd if noise_sd is None else noise_sd)
    v = prior_variances(estimate)
    deg = np.asarray(d.degrees)
    mask = d.rim_circles.rim_columns(k)
    n = np.arange(1, deg.max() + 1)
    vn = np.array([v[mask & (deg == j)][0] for j in n])
    att = d.rim_circles.attenuation(k, np.atleast_1d(rho), n)
    ok = att**2 * vn[None, :] * n_readings / (2 * sigma**2) >= 1.0
    return np.where(ok.any(axis=1), np.sum(np.cumprod(ok, axis=1), axis=1), 0)


@dataclass(frozen=True)
class RimDiagnostics:
    """Per-rim gaps and depth of information.

    Attributes
    ----------
    names : tuple of str
        The rims (``outer``, ``inner``).
    arcs : dict
        Rim name -> unsensed arcs, ndarray (n_arcs, 2), radians.
    points : ndarray of shape (n_points, 2)
    labels : tuple of str
    share : dict
        Rim name -> harmonic measure of its unsensed arcs at ``points``.
    variance_ratio : dict or None
        Rim name -> posterior/prior variance ratio of its function by degree (None: no prior).
    resolved_degree : dict
        Rim name -> {depth fraction (str): degree}.
    """

    names: tuple
    arcs: dict
    points: np.ndarray
    labels: tuple
    share: dict
    variance_ratio: dict | None
    resolved_degree: dict

    def to_dict(self) -> dict:
        """Return the ``by_rim`` entries of ``summary.json`` (``gaps`` and ``depth``)."""
        gaps, depth = {}, {}
        for name in self.names:
            gaps[name] = {
                "unsensed_arcs_deg": np.rad2deg(self.arcs[name]).tolist(),
                "share_at_points": {lab: float(s) for lab, s in
                                    zip(self.labels, self.share[name])},
            }
            depth[name] = {"resolved_degree_at_depth_fraction": self.resolved_degree[name]}
            if self.variance_ratio is not None:
                depth[name]["variance_ratio_by_degree"] = self.variance_ratio[name].tolist()
        return {"gaps": gaps, "depth": depth}


def _variance_ratio(estimate, resolution):
    # Column variance ratios of each rim's function averaged by degree.
    d = estimate.domain
    deg = np.asarray(d.degrees)
    ratio = 1.0 - resolution.column_resolution
    out = {}
    for k, name in enumerate(d.rim_circles.names):
        m = d.rim_circles.rim_columns(k)
        out[name] = np.bincount(deg[m], weights=ratio[m]) / np.bincount(deg[m])
    return out


def rim_diagnostics(estimate, problem, points, labels, resolution=None) -> RimDiagnostics:
    """Gaps and depth of information rim by rim (see the module notes).

    Parameters
    ----------
    estimate : Estimate
    problem : LinearProblem
    points : ndarray of shape (n_points, 2)
        Points whose dependence on each rim's unsensed arcs is reported.
    labels : sequence of str
    resolution : Resolution, optional
        The estimate's model resolution (None: no prior recorded; depth then gives the arcs
        and shares only).
    """
    d = estimate.domain
    circles = d.rim_circles
    arcs, share, resolved = {}, {}, {}
    inner = float(d.inner_relative_radius)
    for k, name in enumerate(circles.names):
        arcs[name] = rim_unsensed_arcs(problem, k)
        share[name] = rim_arc_measure(d, k, points, arcs[name])
        if resolution is not None:
            r0 = circles.radii[k]
            rho = r0 + np.asarray(DEPTH_FRACTIONS) * ((inner if r0 >= 1 else 1.0) - r0)
            deg = rim_resolved_degree(estimate, k, rho, n_readings=problem.n_readings)
            resolved[name] = {f"{f:.2f}": int(n) for f, n in zip(DEPTH_FRACTIONS, deg)}
    ratio = None if resolution is None else _variance_ratio(estimate, resolution)
    return RimDiagnostics(circles.names, arcs, np.asarray(points, float), tuple(labels), share,
                          ratio, resolved)
