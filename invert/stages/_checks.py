"""Checks of stage settings shared by the Gaussian and MCMC stages.

Checks of stage settings shared by the Gaussian and MCMC stages (scikit-learn's message
shape: the parameter, what is allowed, what was got).
"""

from __future__ import annotations

import numpy as np

__all__ = ["check_s_bounds", "check_positive"]


def check_s_bounds(s_bounds, where):
    """Check a smoothness range ``s_bounds``.

    ``(lo, hi)`` as floats with ``0.5 < lo < hi`` (a proper smoothness prior), else
    ValueError naming the stage ``where``.
    """
    try:
        lo, hi = (float(v) for v in s_bounds)
        ok = np.isfinite(lo) and np.isfinite(hi) and 0.5 < lo < hi
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ValueError(f"The 's_bounds' parameter of {where} must be a pair (lo, hi) with "
                         f"0.5 < lo < hi. Got {s_bounds!r} instead.")
    return lo, hi


def check_positive(value, name, where):
    """``value`` as a float > 0, or None; else ValueError naming the parameter and stage."""
    if value is None:
        return None
    try:
        v = float(value)
        ok = np.isfinite(v) and v > 0
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ValueError(f"The '{name}' parameter of {where} must be a float > 0 or None. "
                         f"Got {value!r} instead.")
    return v
