r"""Where to add a sensor, and which failed sensor to repair first.

A new reading :math:`g^\top c + e`, :math:`e \sim N(0,\sigma^2)`, changes the posterior
covariance by a rank-one update, so the gain of every candidate is known before any reading is
taken (the design needs no data). Depends on NumPy only (pandas inside :meth:`to_frames`).
Rims, rim angles (sensor spacing) and candidate rings come from the domain's ``rim_circles``
(:mod:`invert.geometry.rims`: the disk's rim; an annulus's outer and inner rims and its wall); a
domain without them (a ball) gets a clear ``ValueError``.

Notes
-----
With :math:`\Gamma` the current posterior covariance and the target
:math:`J(\Gamma) = \operatorname{tr}(H\Gamma H^\top)` (mean posterior variance over the disk, or
over query points),

.. math:: \Gamma_\text{new} = \Gamma - \frac{\Gamma g g^\top \Gamma}{\sigma^2 + g^\top\Gamma g},
          \qquad
          J(\Gamma) - J(\Gamma_\text{new}) = \frac{\|H\Gamma g\|^2}{\sigma^2 + g^\top\Gamma g}

(the goal-oriented A-optimal gain [1]_ [2]_). Sensors are chosen greedily, one rank-one update
at a time, keeping a minimum angular spacing between new sensors because optimal designs
otherwise cluster [3]_.

References
----------
.. [1] A. Alexanderian, "Optimal experimental design for infinite-dimensional Bayesian inverse
       problems governed by PDEs: a review", Inverse Problems 37:043001, 2021.
       doi:10.1088/1361-6420/abe10c
.. [2] A. Krause, A. Singh and C. Guestrin, "Near-optimal sensor placements in Gaussian
       processes", JMLR 9:235–284, 2008.
.. [3] Y. Daon, "Optimal experimental design: clusterization of sensors", arXiv:2007.12032, 2020.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "SensorAdvice",
    "advise",
    "disk_mean_variance_weights",
    "target_matrix",
    "variance_gain",
    "rank_one_update",
    "greedy_design",
    "default_candidates",
    "require_circles",
]


def disk_mean_variance_weights(degrees) -> np.ndarray:
    r"""Return the region-mean weights of the disk columns.

    Diagonal of :math:`M = \frac{1}{\pi R^2}\int_\text{disk} h(x)h(x)^\top dA` for the disk
    basis, so that the mean posterior variance over the disk is :math:`\operatorname{tr}(\Gamma
    M)`.

    Notes
    -----
    The columns :math:`\rho^n\cos n\theta`, :math:`\rho^n\sin n\theta` are orthogonal over the
    disk, and :math:`\frac1\pi\int_0^1\int_0^{2\pi}\rho^{2n}\cos^2 n\theta\,d\theta\,\rho\,d\rho
    = \frac{1}{2n+2}` for :math:`n \ge 1`; the constant column gives 1.
    """
    n = np.asarray(degrees, float)
    return np.where(n == 0, 1.0, 1.0 / (2 * n + 2))


def target_matrix(domain, query=None) -> np.ndarray:
    r"""Matrix :math:`H` with target :math:`\operatorname{tr}(H\Gamma H^\top)`.

    Parameters
    ----------
    domain : Domain
        Asked for ``design``, ``region_mean_square()`` and, when that is None, ``field_grid``.
    query : ndarray of shape (n_points, dim), optional
        With query points the target is the mean variance at them, :math:`H = G_q/\sqrt{n_q}`;
        otherwise the mean variance over the region: closed form when the domain gives
        ``region_mean_square()`` (the disk's diagonal, :func:`disk_mean_variance_weights`; the
        annulus's full matrix, factored by ``eigh``), a grid average otherwise.
    """
    if query is not None:
        q = np.asarray(query, float)
        return domain.design(q) / np.sqrt(len(q))
    weights = domain.region_mean_square()
    if weights is not None and np.ndim(weights) == 2:
        # a full matrix M (an annulus's rims overlap): H = diag(sqrt(w)) V^T, M = V diag(w) V^T
        w, V = np.linalg.eigh(0.5 * (weights + np.transpose(weights)))
        return np.sqrt(np.clip(w, 0.0, None))[:, None] * V.T
    if weights is not None:
        return np.diag(np.sqrt(weights))
    pts, _ = domain.field_grid(41)
    return domain.design(pts) / np.sqrt(len(pts))


def variance_gain(cov, H, rows, noise_var) -> np.ndarray:
    r"""Return the target reduction from one new reading at each candidate.

    Reduction of :math:`\operatorname{tr}(H\Gamma H^\top)` from one new reading at each of
    ``rows`` (shape (n_candidates, n_coef)): :math:`\|H\Gamma g\|^2/(\sigma^2+g^\top\Gamma g)`.
    """
    rows = np.atleast_2d(rows)
    Gg = rows @ cov  # (k, p): (Gamma g)^T for each candidate
    num = np.sum((Gg @ H.T) ** 2, axis=1)
    den = np.asarray(noise_var, float) + np.sum(Gg * rows, axis=1)
    return num / den


def rank_one_update(cov, g, noise_var) -> np.ndarray:
    r"""Return the posterior covariance after one more reading.

    Posterior covariance after one more reading with row ``g`` and noise variance
    ``noise_var``: :math:`\Gamma - \Gamma gg^\top\Gamma/(\sigma^2 + g^\top\Gamma g)`.
    """
    g = np.asarray(g, float)
    Gg = cov @ g
    new = cov - np.outer(Gg, Gg) / (float(noise_var) + g @ Gg)
    return 0.5 * (new + new.T)


def greedy_design(cov, H, rows, noise_var, count, *, points=None, min_distance=0.0):
    """Choose ``count`` candidates greedily by :func:`variance_gain`.

    Parameters
    ----------
    cov : ndarray of shape (p, p)
    H : ndarray of shape (k, p)
    rows : ndarray of shape (n_candidates, p)
    noise_var : float or ndarray of shape (n_candidates,)
    count : int
    points : ndarray of shape (n_candidates, dim), optional
        Positions, for the spacing rule.
    min_distance : float, default=0.0
        New sensors stay at least this far apart.

    Returns
    -------
    picks : list of int
        Indices into ``rows`` in the order chosen.
    gains : list of float
        Reduction of the target by each pick, given the ones before it.
    cov : ndarray
        Posterior covariance after all picks.
    """
    noise_var = np.broadcast_to(np.asarray(noise_var, float), (len(rows),))
    allowed = np.ones(len(rows), bool)
    picks, gains = [], []
    for _ in range(int(count)):
        if not allowed.any():
            break
        gain = np.where(allowed, variance_gain(cov, H, rows, noise_var), -np.inf)
        i = int(np.argmax(gain))
        picks.append(i)
        gains.append(float(gain[i]))
        cov = rank_one_update(cov, rows[i], noise_var[i])
        allowed[i] = False
        if points is not None and min_distance > 0:
            allowed &= np.linalg.norm(points - points[i], axis=1) >= min_distance
    return picks, gains, cov


def require_circles(domain, what):
    """Return the domain's ``rim_circles``; ``ValueError`` naming ``what`` when it has none."""
    circles = getattr(domain, "rim_circles", None)
    if circles is None:
        raise ValueError(f"{what} needs a region bounded by circles about its centre (a disk or "
                         f"an annulus); {type(domain).__name__} has none.")
    return circles


def default_candidates(domain, n_rim=360):
    """Return the default candidate positions for new sensors.

    Positions every ``360/n_rim`` degrees on every rim (``domain.rim_grid``: the disk's rim,
    both rims of an annulus) and interior points every 10 degrees on rings 1/4, 1/2 and 3/4 of
    the way from the inner boundary (the centre of a disk, the bore of an annulus) to the outer
    rim (:meth:`~invert.geometry.rims.RimCircles.interior_radii`).
    """
    circles = require_circles(domain, "default_candidates")
    rim, _ = domain.rim_grid(n_rim)
    th = np.deg2rad(np.arange(0, 360, 10.0))
    inner = np.vstack([circles.ring(r, th) for r in circles.interior_radii()])
    return np.vstack([rim, inner])


@dataclass(frozen=True)
class SensorAdvice:
    """Ranked new sensor positions and failed sensors to repair.

    Attributes
    ----------
    target : str
        What is reduced: ``"mean variance over the disk"`` or ``"mean variance at the query
        points"``.
    target_before : float
        Its current value (field units squared).
    points : ndarray of shape (count, 2)
        Chosen positions in rank order.
    on_rim : ndarray of bool
    theta_deg : ndarray
        Rim angle of each (NaN for interior positions).
    position : ndarray of str
        Where each lies: the rim's name (``rim``; ``outer``, ``inner``) or the interior's
        (``interior``; ``wall``), from the domain's ``rim_circles``.
    reduction : ndarray
        Reduction of the target by each pick, given the ones before it.
    target_after : ndarray
        Target after each pick.
    repair_sensor : ndarray of str
        Failed sensors ranked by the reduction their repair would give on its own.
    repair_points : ndarray of shape (n_gaps, 2)
    repair_reduction : ndarray
    noise_sd : float
        Noise sd assumed for a new or repaired reading.
    min_spacing_deg : float
    """

    target: str
    target_before: float
    points: np.ndarray
    on_rim: np.ndarray
    theta_deg: np.ndarray
    reduction: np.ndarray
    target_after: np.ndarray
    repair_sensor: np.ndarray
    repair_points: np.ndarray
    repair_reduction: np.ndarray
    noise_sd: float
    min_spacing_deg: float
    position: np.ndarray = None

    def to_frames(self):
        """``(candidates, repair)`` pandas DataFrames as written to CSV."""
        import pandas as pd

        cand = pd.DataFrame({
            "rank": np.arange(1, len(self.points) + 1),
            "x": self.points[:, 0], "y": self.points[:, 1],
            "theta_deg": self.theta_deg,
            "position": (np.where(self.on_rim, "rim", "interior") if self.position is None
                         else self.position),
            "reduction": self.reduction, "target_after": self.target_after,
        })
        rp = self.repair_points.reshape(-1, 2)
        rep = pd.DataFrame({
            "rank": np.arange(1, len(self.repair_sensor) + 1),
            "sensor": self.repair_sensor, "x": rp[:, 0], "y": rp[:, 1],
            "reduction": self.repair_reduction,
            "target_after": self.target_before - self.repair_reduction,
        })
        return cand, rep


def _nominal_spacing(domain, problem):
    # Median ccw gap between consecutive sensors (working or failed) along each rim, pooled over
    # the rims with at least two sensors; radians.
    circles = require_circles(domain, "advise")
    pts = [p for p in (problem.points, problem.gap_points) if p is not None and len(p)]
    pts = np.vstack(pts)
    gaps = []
    for k in range(len(circles.names)):
        a = np.sort(circles.rim_angles(pts, k))
        if a.size >= 2:
            gaps.append(np.diff(np.append(a, a[0] + 2 * np.pi)))
    if not gaps:
        return np.deg2rad(10.0)
    return float(np.median(np.concatenate(gaps)))


def advise(estimate, problem, *, count=5, candidates=None, query=None, min_spacing_deg=None,
           noise_sd=None) -> SensorAdvice:
    r"""Rank new sensor positions and failed sensors by how much they would cut the target.

    Parameters
    ----------
    estimate : Estimate
        The current fit; its posterior covariance (or the covariance of its draws) is
        :math:`\Gamma`.
    problem : LinearProblem
        Gives the failed sensors (``gap_points``) and the sensor spacing.
    count : int, default=5
        Number of new sensors to choose.
    candidates : ndarray of shape (n, 2), optional
        Positions to choose from; default :func:`default_candidates`.
    query : ndarray of shape (n_q, 2), optional
        Target the mean variance at these points instead of over the disk.
    min_spacing_deg : float, optional
        Minimum angle between new sensors (as a chord: distance :math:`2R\sin(\Delta/2)`);
        default half the nominal sensor spacing.
    noise_sd : float, optional
        Noise sd of a new reading; default the median given sigma, else the fit's noise sd.

    Returns
    -------
    SensorAdvice

    Notes
    -----
    For a Student-t posterior both :math:`\Gamma` and :math:`\sigma^2` are at the estimated
    noise level; reported variances include the factor :math:`\nu/(\nu-2)`.
    """
    if int(count) != count or count < 1:
        raise ValueError(f"The 'count' parameter of advise must be an integer >= 1. Got {count!r} "
                         f"instead.")
    d = estimate.domain
    cov = estimate.cov if estimate.cov is not None else np.cov(estimate.draws, rowvar=False)
    factor = estimate._var_factor if estimate.cov is not None else 1.0
    if noise_sd is None:
        noise_sd = float(np.median(problem.sigma)) if problem.sigma is not None else \
            float(estimate.noise_sd)
    nv = float(noise_sd) ** 2
    H = target_matrix(d, query)
    before = float(np.sum((H @ cov) * H)) * factor
    cand = default_candidates(d) if candidates is None else np.asarray(candidates, float)
    rows = d.design(cand)
    circles = require_circles(d, "advise")
    _, th = circles.polar(cand)
    on_rim = circles.which(cand) >= 0
    if min_spacing_deg is None:
        min_spacing_deg = float(np.rad2deg(_nominal_spacing(d, problem))) / 2
    min_dist = 2 * d.radius * np.sin(np.deg2rad(min_spacing_deg) / 2)
    picks, gains, _ = greedy_design(cov, H, rows, nv, count, points=cand, min_distance=min_dist)
    gains = np.asarray(gains) * factor
    picks = np.asarray(picks, int)
    gp = problem.gap_points if problem.gap_points is not None else np.empty((0, 2))
    if len(gp):
        rg = variance_gain(cov, H, d.design(gp), nv) * factor
        order = np.argsort(-rg, kind="stable")
        rep_s, rep_p, rep_g = np.asarray(problem.gap_sensor)[order], gp[order], rg[order]
    else:
        rep_s, rep_p, rep_g = np.array([], str), np.empty((0, 2)), np.array([])
    theta = np.where(on_rim[picks], np.mod(np.rad2deg(th[picks]), 360.0), np.nan)
    return SensorAdvice(
        target="mean variance at the query points" if query is not None
        else f"mean variance over the {circles.region}",
        target_before=before, points=cand[picks], on_rim=on_rim[picks], theta_deg=theta,
        reduction=gains, target_after=before - np.cumsum(gains), repair_sensor=rep_s,
        repair_points=rep_p, repair_reduction=rep_g, noise_sd=float(noise_sd),
        min_spacing_deg=float(min_spacing_deg),
        position=circles.position_names(cand[picks]),
    )
