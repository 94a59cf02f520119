"""One-dimensional minimisation: a coarse grid scan, then bounded refinement around its best."""

from __future__ import annotations

import numpy as np
from scipy import optimize


def grid_then_refine(f, grid, *, xatol):
    """Minimise scalar ``f`` over ``[grid[0], grid[-1]]``.

    Scans ``grid``, then runs bounded Brent minimisation between the neighbours of the best grid
    point; the refined point is kept only if it is at least as good. Returns ``(x, f(x))``.
    """
    grid = np.asarray(grid, dtype=float)
    vals = np.array([f(g) for g in grid])
    i = int(np.argmin(vals))
    a, b = grid[max(i - 1, 0)], grid[min(i + 1, len(grid) - 1)]
    res = optimize.minimize_scalar(f, bounds=(a, b), method="bounded", options={"xatol": xatol})
    if res.fun <= vals[i]:
        return float(res.x), float(res.fun)
    return float(grid[i]), float(vals[i])
