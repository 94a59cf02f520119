"""Helpers shared by the emcee and Gibbs samplers: chain length checks and a progress bar."""

from __future__ import annotations

import sys

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
    """Return a tqdm bar over ``total`` steps, shown only with ``progress`` on a terminal."""
    from tqdm.auto import tqdm

    show = bool(progress) and sys.stderr.isatty()
    return tqdm(total=total, disable=not show, desc=desc, leave=False)
