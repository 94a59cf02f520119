r"""Suspect readings kept in the posterior: a mixture over "all good" and "this one faulty".

Notes
-----
The good/faulty model of :mod:`invert.stages.robust` (each reading faulty with prior
probability :data:`~invert.stages.robust.FAULT_RATE`, a faulty reading's sd
:math:`\sigma_{bad}`) gives each reading a fault probability :math:`p_i` from its exact
leave-one-out predictive density (Sundararajan & Keerthi 2001; Hogg, Bovy & Lang 2010,
eq. 17). :mod:`~invert.stages.robust` leaves out readings with
:math:`p_i` above :data:`~invert.stages.robust.FLAG_PROBABILITY`; below it, plugging in
"good" is over-confident exactly where a suspect reading sits (next to a gap its neighbours
cannot check it). Here the posterior is the mixture

.. math:: p(c\mid y) \approx \Bigl(1 - \sum_{i\in S} p_i\Bigr)\,p(c\mid y)
          + \sum_{i\in S} p_i\,p(c\mid y_{-i}),

over the suspects :math:`S`: of the :data:`MAX_SUSPECTS` readings of largest closed-form
leave-one-out error, those whose fault probability from the refit without them (hyperparameters
chosen again: the exact leave-one-out) reaches :data:`MIN_PROBABILITY`. It is the exact
posterior of the two-component model restricted to at most one faulty reading among the
suspects (the single-fault approximation; with :math:`\sum p_i > 1` the weights are
normalised). Each :math:`p(c\mid y_{-i})` is the stage
refitted without reading :math:`i`. The estimate is the Gaussian with the mixture's mean and
covariance (as :mod:`invert.stages.averaged`).
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np

from ..errors import FitWarning
from .robust import (
    FAULT_RATE,
    Z_GROSS,
    fault_probabilities,
    gross_notes,
    loo_predictive,
    predictive,
    range_screen,
    sigma_bad_for,
    without,
)

__all__ = ["MIN_PROBABILITY", "MAX_SUSPECTS", "NAME_PROBABILITY", "mix_suspects",
           "gaussian_mixture", "screened_mixture"]

#: Fault probability above which a reading joins the mixture: the prior fault rate, i.e. the
#: reading's own density favours "faulty" (Bayes factor above 1). At 0.01 clean readings on a
#: noise-free ring already entered (their probability sits near 0.05 sqrt(v_good / v_bad)).
MIN_PROBABILITY = FAULT_RATE
#: At most this many suspects (the most probable) are mixed in.
MAX_SUSPECTS = 3
#: Fault probability above which a suspect is named in the warnings (posterior odds 9 : 1).
NAME_PROBABILITY = 0.9


def gaussian_mixture(weights, estimates):
    """Mean and covariance of the mixture ``sum_k w_k N(mean_k, cov_k)`` (weights normalised)."""
    w = np.asarray(weights, float)
    w = w / w.sum()
    M = np.array([e.mean for e in estimates])
    mean = w @ M
    D = M - mean
    cov = np.einsum("k,kij->ij", w, np.array([e.cov for e in estimates])) + (D.T * w) @ D
    return mean, cov


def mix_suspects(estimate, problem, fit_fn, *, rate=FAULT_RATE):
    """Return ``estimate`` mixed with refits without each suspect reading (module Notes).

    Parameters
    ----------
    estimate : Estimate
        The fit to ``problem`` (Gaussian, with ``cov``).
    problem : LinearProblem
        The readings it was fitted to.
    fit_fn : callable
        ``fit_fn(problem) -> Estimate``, the same stage.

    Returns
    -------
    Estimate
        Unchanged when no reading's fault probability reaches :data:`MIN_PROBABILITY`;
        otherwise the mixture, with ``info["suspects"]`` (sensor -> probability) and a warning
        for each suspect above :data:`NAME_PROBABILITY`. A refit is widened to at least the
        cross-validated scale of ``estimate`` (``info["calibration"]``, :mod:`.cv_scale`).
    """
    if estimate.cov is None or problem.n_readings < 6:
        return estimate
    mu, vs, vn = loo_predictive(estimate, problem)
    z = np.abs(problem.y - mu) / np.sqrt(vs + vn)
    cand = [int(i) for i in np.argsort(-z)[:MAX_SUSPECTS]]
    p = np.zeros(problem.n_readings)
    refits = {}
    for i in cand:  # the exact leave-one-out: hyperparameters chosen again without reading i
        drop = np.zeros(problem.n_readings, bool)
        drop[i] = True
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            refits[i] = fit_fn(without(problem, drop))
        m_i, v_i, n_i = predictive(refits[i], problem.subset(np.array([i])))
        p[i] = fault_probabilities(problem.y[i:i + 1], m_i, v_i, n_i,
                                   sigma_bad_for(refits[i], problem), rate, refits[i].df)[0]
    sus = [i for i in cand if p[i] >= MIN_PROBABILITY]
    if not sus:
        return estimate
    weights = [max(1.0 - float(sum(p[i] for i in sus)), 0.0)] + [float(p[i]) for i in sus]
    parts = [estimate] + [_at_scale(refits[i], estimate) for i in sus]
    mean, cov = gaussian_mixture(weights, parts)
    sensors = np.asarray(problem.sensor).astype(str)
    notes = [f"sensor {sensors[i]} may be faulty (fault probability {p[i]:.3g} under the "
             f"good/faulty mixture): the intervals include the fit without its reading "
             f"({problem.y[i]:.6g})" for i in sus if p[i] >= NAME_PROBABILITY]
    for n in notes:
        warnings.warn(n, FitWarning, stacklevel=2)
    info = dict(estimate.info)
    info["suspects"] = {
        "probability": {str(sensors[i]): float(p[i]) for i in sus},
        "method": f"mixture over all readings good and each suspect faulty (single-fault "
                  f"approximation; suspects: fault probability >= {MIN_PROBABILITY:g}, at "
                  f"most {MAX_SUSPECTS}), moments matched",
    }
    return dataclasses.replace(estimate, mean=mean, cov=cov, info=info,
                               warnings=tuple(estimate.warnings) + tuple(notes))


def _at_scale(refit, estimate):
    # The held-out check on all readings sets the least scale of every component: a refit
    # without a suspect is widened to the full fit's cross-validated factor (invert.stages.
    # cv_scale), so dropping a reading that may be a real sharp feature does not make the
    # rest look better calibrated than the readings showed.
    full = (estimate.info.get("calibration") or {}).get("factor", 1.0)
    own = (refit.info.get("calibration") or {}).get("factor", 1.0)
    if full <= own:
        return refit
    return dataclasses.replace(refit, cov=refit.cov * (full / own))


def screened_mixture(problem, fit_fn):
    """Gross errors left out (one refit), then the fit with its suspects mixed in.

    The robust treatment of the averaged stage: :func:`~invert.stages.robust.range_screen`
    finds sentinels and unit slips far outside the ring's spread (named, moved to the gaps);
    :func:`mix_suspects` keeps every other doubtful reading in the posterior as a mixture
    instead of a yes/no exclusion.

    Returns
    -------
    estimate : Estimate
    problem : LinearProblem
        The readings without the gross errors (they are moved to the gaps).
    """
    gross = range_screen(problem, fit_fn) if problem.n_readings >= 6 else {}
    drop = np.zeros(problem.n_readings, bool)
    drop[list(gross)] = True
    final = without(problem, drop)
    est = mix_suspects(fit_fn(final), final, fit_fn)
    if not gross:
        return est, final
    notes = gross_notes(problem, gross)
    for n in notes:
        warnings.warn(n, FitWarning, stacklevel=2)
    sensors = np.asarray(problem.sensor).astype(str)
    info = dict(est.info)
    info["robust"] = {
        "gross_errors": {sensors[i]: float(z) for i, z in sorted(gross.items())},
        "faulty": {},
        "method": f"values far outside the ring's spread refitted without and tested "
                  f"together: gross error if |z| > {Z_GROSS:g}; other doubtful readings kept "
                  f"in the posterior as a good/faulty mixture (info 'suspects')",
    }
    return dataclasses.replace(est, info=info, warnings=tuple(est.warnings) + tuple(notes)), final
