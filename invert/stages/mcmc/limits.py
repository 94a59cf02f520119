"""Size limits of the MCMC stage's per-reading outputs (dense snapshots)."""

from __future__ import annotations

__all__ = ["LOO_MAX_READINGS", "PER_READING_CELLS", "per_reading_step", "loo_note"]

#: Most readings for which PSIS-LOO gets the integrated leave-one-out likelihood (its cost is
#: draws x readings x coefficients^2; beyond this the pointwise likelihood given the
#: coefficients is used, as is common practice).
LOO_MAX_READINGS = 256
#: Most draws x readings kept in the per-reading groups of the posterior (log-likelihood,
#: predictive readings): 32 MB per array; beyond it every t-th draw is kept there.
PER_READING_CELLS = 4_000_000


def per_reading_step(n_chains, n_draws, n_readings) -> int:
    """Step ``t`` between the draws kept in the per-reading groups (1: all)."""
    return max(1, -(-n_chains * n_draws * n_readings // PER_READING_CELLS))


def loo_note(n_chains, n_draws, n_readings, integrated=True) -> list:
    """Return notes on what the per-reading groups hold for this size (empty: complete).

    ``integrated`` tells whether the integrated leave-one-out likelihood was computed.
    """
    notes = []
    if n_readings > LOO_MAX_READINGS and not integrated:
        notes.append(f"PSIS-LOO uses the pointwise likelihood given the coefficients (more "
                     f"than {LOO_MAX_READINGS} readings)")
    t = per_reading_step(n_chains, n_draws, n_readings)
    if t > 1:
        notes.append(f"the per-reading groups of the posterior (log-likelihood, predictive "
                     f"readings; PSIS-LOO) keep every {t}-th draw")
    return notes
