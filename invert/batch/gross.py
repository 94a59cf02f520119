"""Gross cells of a batch frame: found at the run's hyperparameters, dropped, and named.

A cell whose whitened residual from its frame's fit exceeds
:data:`invert.stages.robust.Z_GROSS` noise sd is a gross error (a -9999 sentinel, a unit slip,
a spike). The residual is smaller than the leave-one-out error (it is :math:`(1-h_i)` times
it), so the test is conservative: under the model a clean cell passes it with probability
below 1.5e-23. The frame is solved again without the cell (a new drop-out pattern), stays
``ok`` and names the cell in its ``reason``. The test is repeated once, in case a second gross
cell was hidden by the first.
"""

from __future__ import annotations

import numpy as np

from ..stages.robust import Z_GROSS

__all__ = ["drop_gross_cells", "gross_mask"]

#: Rounds of drop-and-resolve per chunk.
ROUNDS = 2


def gross_mask(residual, noise_var, observed, z_limit=Z_GROSS):
    """Cells whose whitened residual is beyond ``z_limit`` noise sd (observed cells only)."""
    return observed & (np.abs(residual) > z_limit * np.sqrt(noise_var))


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
    names = _names(inverter, Y.shape[1])
    for _ in range(ROUNDS):
        bad = gross_mask(resid, inverter.noise_var, np.isfinite(Y))
        rows = np.flatnonzero(bad.any(axis=1) & (np.isfinite(Y).sum(axis=1)
                                                  - bad.sum(axis=1) >= 2))
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
        resid[rows] = r2
    return res, n_new, reason, np.isfinite(Y).sum(axis=1)
