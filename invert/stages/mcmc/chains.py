"""Helpers shared by the emcee and Gibbs samplers: chain length checks and a progress bar."""

from __future__ import annotations

import numpy as np

from . import diagnostics as diag

__all__ = ["autocorr_max", "progress_bar"]


def autocorr_max(chain):
    """Return the largest integrated autocorrelation time.

    Largest integrated autocorrelation time over parameters (Sokal window c=5); ``inf``
    when it cannot be estimated yet (fewer than 10 steps, or a non-finite estimate).
    """
    if chain.shape[0] < 10:
        return np.inf
    tau = diag.integrated_time(chain, c=5)
    return float(np.max(tau)) if np.all(np.isfinite(tau)) else np.inf


def progress_bar(total, progress, desc):
    """Return a progress counter over ``total`` steps (none without ``progress``).

    A tqdm bar on a terminal, else a plain line every 30 s (:func:`invert.progress.progress`).
    """
    if not progress:
        from tqdm.auto import tqdm

        return tqdm(total=total, disable=True)
    from ...progress import progress as make

    return make(total, desc=desc, unit="step")
