"""Pointwise posterior summaries: the one interval factor and the mean, sd, interval record.

Used by :class:`invert.problem.Estimate` and the batch routes; depends on NumPy and SciPy only
(pandas inside :meth:`PointSummary.to_frame`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

__all__ = ["interval_z", "PointSummary"]


def interval_z(level, df=None) -> float:
    r"""Half-width of the central interval at ``level`` in units of the sd.

    The interval is :math:`m \pm z\,\mathrm{sd}` with :math:`z = \Phi^{-1}((1+\text{level})/2)`,
    or the Student-t quantile on ``df`` degrees of freedom when ``df`` is given (Wahba 1983).

    Parameters
    ----------
    level : float
        Probability of the central interval, in (0, 1).
    df : float, optional
        Degrees of freedom of a Student-t posterior.

    Returns
    -------
    float
    """
    q = (1 + level) / 2
    return float(stats.norm.ppf(q) if df is None else stats.t.ppf(q, df))


@dataclass(frozen=True)
class PointSummary:
    """Posterior summary at points: mean, sd and central interval at ``level``.

    The arrays share one shape: ``(n_points,)`` from :meth:`~invert.problem.Estimate.at`,
    ``(n_y, n_x)`` from :meth:`~invert.problem.Estimate.grid_map` (NaN outside the region;
    :meth:`to_frame` takes 1-D arrays).
    """

    mean: np.ndarray
    sd: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    level: float

    def to_frame(self, **columns):
        """Return a pandas DataFrame: the given leading columns, then mean, sd, lower, upper."""
        import pandas as pd

        data = dict(columns)
        data.update(mean=self.mean, sd=self.sd, lower=self.lower, upper=self.upper)
        return pd.DataFrame(data)
