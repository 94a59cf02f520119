r"""Dependence on gaps: how much an estimate rests on rim arcs no working sensor covers.

The value at an interior point is the Poisson-kernel average of the rim values; the share of
that average taken over rim arcs with no working sensor is the harmonic measure of those arcs
(:func:`gap_dependence`). Arcs need a rim parametrised by one angle: these functions ask the
domain for ``rim_arcs`` (:class:`~invert.geometry.arcs.CircleArcs`) and raise a clear
``ValueError`` for a domain without it.

References
----------
.. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, Cambridge University Press, 2005,
       ch. I. doi:10.1017/CBO9780511546617
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..geometry.arcs import half_mass_width

__all__ = ["GapDependence", "require_arcs", "unsensed_arcs", "arcs_from_angles",
           "half_mass_width", "gap_dependence"]


def require_arcs(domain, what):
    """Return the domain's ``rim_arcs``; ``ValueError`` naming ``what`` when it has none."""
    arcs = getattr(domain, "rim_arcs", None)
    if arcs is None:
        raise ValueError(f"{what} needs a domain with rim arcs (a rim parametrised by one "
                         f"angle); {type(domain).__name__} has none.")
    return arcs


def _circular_gaps(angles):
    # Sorted angles and the ccw gap from each to the next (wrapping).
    a = np.sort(np.mod(angles, 2 * np.pi))
    return a, np.diff(np.append(a, a[0] + 2 * np.pi))


def unsensed_arcs(problem, *, spacing=None) -> np.ndarray:
    r"""Rim arcs farther than half a sensor spacing from every working rim sensor.

    Parameters
    ----------
    problem : LinearProblem
        Working sensors are ``problem.points``; failed ones (gaps) ``problem.gap_points``.
    spacing : float, optional
        Nominal sensor spacing in radians; default the median ccw gap between consecutive rim
        sensors, working or failed; for a dense line (more than 4 rim sensors per coefficient)
        at least pi / n_modes (half a period of the highest harmonic the model holds), so that
        its random spacing makes no arcs.

    Returns
    -------
    ndarray of shape (n_arcs, 2)
        ccw arcs ``(alpha, beta)`` in radians with ``alpha < beta`` (``beta`` may exceed
        :math:`2\pi`). Empty when the working sensors cover the rim; the whole rim
        ``(0, 2*pi)`` when there is no working rim sensor.
    """
    rim = require_arcs(problem.domain, "unsensed_arcs")
    work = rim.rim_angles(problem.points)
    every = np.concatenate([work, rim.rim_angles(problem.gap_points)])
    return arcs_from_angles(work, every, max(int(getattr(problem.domain, "n_modes", 1)), 1),
                            spacing=spacing)


def arcs_from_angles(work, every, n_modes, *, spacing=None) -> np.ndarray:
    """Unsensed arcs of one rim circle from its sensors' angles (the rule of :func:`unsensed_arcs`).

    Parameters
    ----------
    work : ndarray
        Angles (radians) of the working sensors on the rim.
    every : ndarray
        Angles of every sensor on the rim, working or failed (for the nominal spacing).
    n_modes : int
        Highest harmonic of the model (the dense-line rule).
    spacing : float, optional
        Nominal spacing; default as in :func:`unsensed_arcs`.

    Returns
    -------
    ndarray of shape (n_arcs, 2)
    """
    if work.size == 0:
        return np.array([[0.0, 2 * np.pi]])
    if spacing is None:
        spacing = float(np.median(_circular_gaps(every)[1])) if every.size > 1 else 2 * np.pi
        # a dense line of sensors (fibre optics, a camera: more than 4 rim sensors per
        # coefficient) is spaced far below what the model resolves, and its random spacing
        # would make every gap above the median an "arc": there, gaps narrower than half a
        # period of the highest harmonic, pi / n_modes, are no unsensed arcs (our rule)
        if every.size > 4 * (2 * n_modes + 1):
            spacing = max(spacing, np.pi / n_modes)
    half = 0.5 * spacing
    a, gap = _circular_gaps(work)
    # Arcs narrower than 0.1 % of the spacing are rounding of typed sensor positions (6 digits
    # give ~1e-5 of a spacing), not gaps.
    wide = gap > 2 * half + 1e-3 * spacing
    return np.column_stack([a[wide] + half, a[wide] + gap[wide] - half])


@dataclass(frozen=True)
class GapDependence:
    """Share of each point's Poisson-kernel mass over unsensed arcs.

    Attributes
    ----------
    points : ndarray of shape (n_points, 2)
    share : ndarray of shape (n_points,)
        Harmonic measure of the union of unsensed arcs, in [0, 1].
    half_mass_width_deg : ndarray of shape (n_points,)
        Width of the rim arc below the point holding half its kernel mass, degrees.
    arcs : ndarray of shape (n_arcs, 2)
        The unsensed arcs, radians.
    centre_share : float
        Harmonic measure of the arcs at the centre (their share of the rim).
    """

    points: np.ndarray
    share: np.ndarray
    half_mass_width_deg: np.ndarray
    arcs: np.ndarray
    centre_share: float = np.nan


def gap_dependence(problem, points, *, arcs=None) -> GapDependence:
    r"""How much the estimate at ``points`` rests on rim arcs that no working sensor covers.

    Parameters
    ----------
    problem : LinearProblem
    points : array_like of shape (n_points, 2)
        Points inside the region.
    arcs : ndarray of shape (n_arcs, 2), optional
        Arcs to use instead of :func:`unsensed_arcs`.

    Notes
    -----
    .. math:: \text{share}(z) = \sum_k \omega(z; \alpha_k, \beta_k)
              = \sum_k \int_{\alpha_k}^{\beta_k} P(z;\varphi)\,d\varphi,

    with the closed-form harmonic measure :func:`~invert.geometry.arcs.arc_harmonic_measure` [1]_
    (the arcs do not overlap). Points on the rim are moved in by 1e-12 R.

    References
    ----------
    .. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, 2005, ch. I.
    """
    rim = require_arcs(problem.domain, "gap_dependence")
    arcs = unsensed_arcs(problem) if arcs is None else np.asarray(arcs, float).reshape(-1, 2)
    pts = np.asarray(points, float)
    share = rim.harmonic_measure(pts, arcs)
    return GapDependence(pts, np.clip(share, 0.0, 1.0), np.rad2deg(rim.half_mass_width(pts)),
                         arcs, rim.centre_measure(arcs))
