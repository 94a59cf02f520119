"""Gross cells of a batch frame: found at the run's hyperparameters, dropped, and named.

A cell is a gross error (a -9999 sentinel, a unit slip, a spike) when its whitened residual
from its frame's fit exceeds :data:`invert.stages.robust.Z_GROSS` noise sd and its value lies
more than :data:`invert.stages.robust.RANGE_LIMIT` robust sd from the median of its frame
(:func:`gross_mask`). The residual is smaller than the leave-one-out error (it is
:math:`(1-h_i)` times it), so the first condition is conservative: under the model a clean
cell meets it with probability below 1.5e-23. The frame is solved again without the cell (a
new drop-out pattern), stays ``ok`` and names the cell in its ``reason``. One cell per frame is
dropped at a time (the worst), up to :data:`ROUNDS` times.
"""

from __future__ import annotations

import warnings

import numpy as np

from ..stages.robust import RANGE_LIMIT, Z_GROSS

__all__ = ["drop_gross_cells", "gross_mask", "by_sensor"]

#: Rounds of drop-and-resolve per chunk (at most this many gross cells per frame).
ROUNDS = 3


def gross_mask(residual, noise_var, Y, noise_field, z_limit=Z_GROSS):
    """Mark the worst cell of each frame when it is a gross error (module Notes).

    The cell with the largest whitened residual, where that residual exceeds ``z_limit`` noise
    sd *and* its value lies more than :data:`~invert.stages.robust.RANGE_LIMIT` robust sd
    (1.4826 MAD of the frame plus the noise sd ``noise_field``, field units) from the frame's
    median. One cell per frame and round: a -9999 sentinel drags the fit so far that every
    residual of its frame is large; the sentinel's is the largest. The range condition keeps
    a field with a feature the prior does not expect (a step, a hot spot) whole.
    """
    observed = np.isfinite(Y)
    a = np.where(observed, np.abs(residual), -np.inf)
    rows = np.arange(len(a))
    worst = np.argmax(a, axis=1) if a.size else np.zeros(len(a), int)
    bad = np.zeros(a.shape, bool)
    if not a.size:
        return bad
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # frames with no reading
        med = np.nanmedian(Y, axis=1)
        spread = 1.4826 * np.nanmedian(np.abs(Y - med[:, None]), axis=1) + noise_field
    far = np.abs(Y[rows, worst] - med) > RANGE_LIMIT * spread
    bad[rows, worst] = (a[rows, worst] > z_limit * np.sqrt(noise_var)) & far
    return bad


def by_sensor(residual, observed):
    """Residuals in sensor columns: the solver lists a frame's observed sensors first, in order."""
    order = np.argsort(~observed, axis=1, kind="stable")
    out = np.zeros(residual.shape)
    out[np.arange(len(residual))[:, None], order] = residual
    return np.where(observed, out, 0.0)


def _names(inverter, n):
    sensors = getattr(inverter, "sensors", None)
    return sensors if sensors is not None else np.array([f"column {j + 1}" for j in range(n)])


def drop_gross_cells(inverter, Y, reason):
    """Solve frames ``Y``, dropping gross cells (module Notes).

    Parameters
    ----------
    inverter : StaticInverter
    Y : ndarray of shape (n_frames, n_sensors)
    reason : ndarray of object, shape (n_frames,)
        The frames' reasons (None for none); a copy is returned with the dropped cells named.

    Returns
    -------
    result : tuple
        ``(qmean, qsd, centre_mean, centre_sd, chi2)`` as :meth:`StaticInverter.solve`.
    n_new : int
        Patterns factorised.
    reason : ndarray of object
    n_used : ndarray of int
    """
    Y = np.array(Y, float)
    reason = np.array(reason, dtype=object)
    res, n_new, resid = inverter._solve(Y, residuals=True)
    resid = by_sensor(resid, np.isfinite(Y))
    names = _names(inverter, Y.shape[1])
    noise = float(np.median(inverter.sigma)) if inverter.sigma is not None else \
        float(np.sqrt(inverter.noise_var))
    for _ in range(ROUNDS):
        bad = gross_mask(resid, inverter.noise_var, Y, noise)
        left = np.isfinite(Y).sum(axis=1) - bad.sum(axis=1)
        rows = np.flatnonzero(bad.any(axis=1) & (left >= 2))
        if not rows.size:
            break
        w = np.sqrt(inverter.noise_var)
        for i in rows:
            text = "; ".join(f"{names[j]} excluded as a gross error ({Y[i, j]:.6g}, "
                             f"{abs(resid[i, j]) / w:.3g} noise sd from the frame's fit)"
                             for j in np.flatnonzero(bad[i]))
            reason[i] = text if reason[i] is None else f"{reason[i]}; {text}"
        sub = Y[rows]
        sub[bad[rows]] = np.nan
        Y[rows] = sub
        part, k, r2 = inverter._solve(sub, residuals=True)
        n_new += k
        for a, b in zip(res, part, strict=True):
            a[rows] = b
        resid[rows] = by_sensor(r2, np.isfinite(sub))
    return res, n_new, reason, np.isfinite(Y).sum(axis=1)
