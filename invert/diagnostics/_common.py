"""Helpers shared by the diagnostics modules: the prior an estimate carries and its design."""

from __future__ import annotations

import numpy as np

__all__ = ["prior_params", "estimate_design"]


def prior_params(estimate):
    """Return the prior's ``(s, tau)`` recorded on an estimate.

    ``(s, tau)`` the stage recorded (``estimate.prior``); for sampled hyperparameters, their
    posterior medians. Either may be None when the stage recorded no prior.
    """
    return estimate.prior.s, estimate.prior.tau


def estimate_design(estimate, problem):
    """Return ``(G, degrees)`` of the readings in the estimate's basis.

    ``(G, degrees)`` of the problem's readings in the estimate's own basis (a stage may fit
    at another truncation than the problem's).
    """
    d = estimate.domain
    if problem.G.shape[1] == len(d.degrees):
        return problem.G, np.asarray(d.degrees)
    return np.ascontiguousarray(d.design(problem.points)), np.asarray(d.degrees)
