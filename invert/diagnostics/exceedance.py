r"""Exceedance: the probability that the field exceeds a threshold, pointwise or anywhere.

By the maximum principle a harmonic field attains its maximum over the closed region on the
rim (Evans, *PDE*, §2.2.3), so the maximum of each posterior draw is taken over a fine rim grid
whose size the domain chooses (``rim_search_size``).

References
----------
.. [1] L. C. Evans, *Partial Differential Equations*, 2nd ed., AMS, 2010, §2.2.3.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["MaxExceedance", "exceedance_probability", "max_exceedance"]


def exceedance_probability(estimate, points, threshold) -> np.ndarray:
    r"""Posterior probability that the field exceeds ``threshold`` at each point.

    Notes
    -----
    Gaussian: :math:`1 - \Phi((T - \bar u)/\mathrm{sd})`; Student-t: the same with the t
    distribution and the scale :math:`\sqrt{h^\top\Sigma h}`; draws: the fraction of draws
    above :math:`T`.
    """
    pts = np.asarray(points, float)
    if estimate.draws is not None:
        U = estimate.draws @ estimate.domain.design(pts).T
        return np.mean(U > threshold, axis=0)
    H = estimate.domain.design(pts)
    mean = H @ estimate.mean
    scale = np.sqrt(np.sum((H @ estimate._root) ** 2, axis=1))  # sqrt(h' Sigma h)
    z = (threshold - mean) / np.where(scale > 0, scale, np.finfo(float).tiny)
    return stats.norm.sf(z) if estimate.df is None else stats.t.sf(z, estimate.df)


@dataclass(frozen=True)
class MaxExceedance:
    r"""Probability that the maximum of the field anywhere in the region exceeds a threshold.

    Attributes
    ----------
    threshold : float
    probability : float
    mc_se : float
        Monte-Carlo standard error :math:`\sqrt{p(1-p)/n}`.
    n_draws, n_rim : int
    max_lower, max_median, max_upper : float
        Central ``level`` interval and median of the maximum.
    level : float
    """

    threshold: float
    probability: float
    mc_se: float
    n_draws: int
    n_rim: int
    max_lower: float
    max_median: float
    max_upper: float
    level: float


def max_exceedance(estimate, threshold, *, level=0.9, n_draws=4000, n_rim=None,
                   rng=None) -> MaxExceedance:
    r"""Probability that the field exceeds ``threshold`` somewhere in the region.

    Parameters
    ----------
    estimate : Estimate
    threshold : float
    level : float, default=0.9
        Probability of the reported interval of the maximum.
    n_draws : int, default=4000
        Posterior draws of the coefficients (:meth:`Estimate.sample`); Monte-Carlo error is
        at most 0.008 at this size.
    n_rim : int, optional
        Rim grid size (``domain.rim_grid(n_rim)``); default ``domain.rim_search_size()``:
        ``max(720, 16 * n_modes)`` on a disk (at least 16 points per shortest wavelength), 360
        (the 5-degree latitude/longitude grid) on a ball.
    rng : None, int or Generator

    Notes
    -----
    By the maximum principle a harmonic field attains its maximum over the closed region on
    the rim, so the maximum of each draw is taken over a fine rim grid; no interior grid is
    needed (Evans, *PDE*, §2.2.3). The probability is the fraction of draws whose rim maximum
    exceeds :math:`T`.
    """
    rng = np.random.default_rng(rng)
    d = estimate.domain
    if n_rim is None:
        n_rim = d.rim_search_size()
    pts, _ = d.rim_grid(n_rim)
    H = d.design(pts)
    top = np.empty(n_draws)
    for start in range(0, n_draws, 1000):
        c = estimate.sample(min(1000, n_draws - start), rng)
        top[start:start + len(c)] = (c @ H.T).max(axis=1)
    p = float(np.mean(top > threshold))
    lo, med, hi = np.quantile(top, [(1 - level) / 2, 0.5, (1 + level) / 2])
    return MaxExceedance(float(threshold), p, float(np.sqrt(max(p * (1 - p), 0) / n_draws)),
                         int(n_draws), int(n_rim), float(lo), float(med), float(hi), level)
