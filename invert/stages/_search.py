"""One-dimensional minimisation: a coarse grid scan, then bounded refinement around its best.

The one grid-then-Brent search of the package; every 1-D hyperparameter search (the Tikhonov
parameter, the Gaussian stage's prior-to-noise ratio and smoothness, the assimilation time
scale) calls it with its own tolerance.
"""

from __future__ import annotations

import numpy as np
from scipy import optimize

__all__ = ["grid_then_refine"]


def grid_then_refine(f, grid, *, xatol, values=None, refine_at_edge=True, full_output=False):
    """Minimise scalar ``f`` over ``[grid[0], grid[-1]]``.

    Scans ``grid``, then runs bounded Brent minimisation (:func:`scipy.optimize.
    minimize_scalar`, ``method="bounded"``) between the neighbours of the best grid point;
    the refined point is kept only if it is at least as good.

    Parameters
    ----------
    f : callable
        Scalar function of one float.
    grid : array_like of shape (n,)
        Increasing scan points.
    xatol : float
        Absolute tolerance of the refinement in ``x``.
    values : array_like of shape (n,), optional
        ``f`` on the grid when already known (e.g. from a vectorised scan); ``+inf`` marks
        points to avoid.
    refine_at_edge : bool, default=True
        With False, a best grid point at either end is returned without refinement.
    full_output : bool, default=False
        Also return the index of the best grid point and whether the refined point was kept.

    Returns
    -------
    x, fx : float
        The minimiser found and ``f`` there.
    index : int
        Only with ``full_output``: the best grid point.
    refined : bool
        Only with ``full_output``: whether ``x`` comes from the refinement.
    """
    grid = np.asarray(grid, dtype=float)
    vals = np.array([f(g) for g in grid]) if values is None else np.asarray(values, float)
    i = int(np.argmin(vals))
    refined = False
    x, fx = float(grid[i]), float(vals[i])
    if refine_at_edge or i not in (0, len(grid) - 1):
        a, b = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
        res = optimize.minimize_scalar(f, bounds=(a, b), method="bounded",
                                       options={"xatol": xatol})
        if res.fun <= vals[i]:
            x, fx, refined = float(res.x), float(res.fun), True
    return (x, fx, i, refined) if full_output else (x, fx)
