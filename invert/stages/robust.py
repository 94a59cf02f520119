r"""Gross-error screening and the good/faulty sensor mixture for the default fit.

Both treatments wrap any stage fit ``fit_fn(problem) -> Estimate`` (the assembly layer passes
the default Tikhonov stage) and share one step (:func:`screen`): every reading is predicted
from the *other* readings by refitting the stage without it, hyperparameters re-chosen (exact
leave-one-out refits). Re-choosing matters: one -9999 sentinel among rim readings makes the
evidence prefer an interpolating fit with a huge prior scale, under which the sentinel looks
plausible (and a faulty sensor inflates the prior scale so that it hides itself); without it
the rest predicts it sharply.

gross errors
    A reading more than :data:`Z_GROSS` predictive sd from that prediction whose value also
    lies more than :data:`RANGE_LIMIT` robust sd from the median of the readings (the two
    conditions batch applies per frame, :mod:`invert.batch.gross`). A feature of the field (a
    line source just outside the rim, a step) can put one sensor 10 predictive sd out, but
    not outside the span of the ring; such a reading is judged by the mixture instead. Values
    that far out are first tested together, so that two sentinels do not hide each other.
faulty sensors
    Each reading is good, :math:`N(y_i\mid g_i^\top c, \sigma_i^2)`, or faulty,
    :math:`N(y_i\mid g_i^\top c, \sigma_{bad}^2)`, with prior fault probability
    :data:`FAULT_RATE` — the model of ``--method mcmc --faulty`` (Hogg, Bovy & Lang 2010 [1]_,
    :mod:`invert.stages.mcmc.augmented`: the prior mean of its fault rate and the same
    :math:`\sigma_{bad} = \max(\operatorname{sd}(y), 10\,\sigma)`). The E-step gives each
    reading's fault probability from its leave-one-out predictive density
    :math:`N(y_i\mid\mu_{-i}, v_{-i} + \sigma_i^2)` against :math:`N(y_i\mid\mu_{-i}, v_{-i} +
    \sigma_{bad}^2)` (Sundararajan & Keerthi 2001 [2]_ for the predictive); the M-step refits
    the stage on the readings not flagged (classification EM, Celeux & Govaert 1992 [3]_; the
    soft weight of a faulty reading, :math:`\sigma^2/\sigma_{bad}^2 \le 1/100`, is nearly zero
    anyway), one reading at a time (the worst, backward deletion).

When no reading is a gross error and none has a fault probability above
:data:`FLAG_PROBABILITY` the ordinary fit is returned unchanged.

References
----------
.. [1] D. W. Hogg, J. Bovy and D. Lang, "Data analysis recipes: fitting a model to data",
       arXiv:1008.4686, 2010, §3.
.. [2] S. Sundararajan and S. S. Keerthi, "Predictive approaches for choosing hyperparameters
       in Gaussian processes", Neural Computation 13:1103–1118, 2001.
.. [3] G. Celeux and G. Govaert, "A classification EM algorithm for clustering and two
       stochastic versions", Comput. Stat. Data Anal. 14:315–332, 1992.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
from scipy import stats

from ..errors import FitWarning

__all__ = ["Z_GROSS", "RANGE_LIMIT", "FAULT_RATE", "FLAG_PROBABILITY", "loo_predictive",
           "predictive", "fault_probabilities", "without", "screen", "range_screen",
           "sigma_bad_for", "robust_fit", "gross_notes"]

#: Predictive sd beyond which a reading is a gross error. Under the model the leave-one-out
#: standardised error is N(0, 1) (Student-t on the residual dof when the noise level is
#: estimated): P(|z| > 10) is 1.5e-23, and 1.6e-6 even for a t with 10 dof, so a clean ring
#: of 100 sensors is flagged by chance less than once in 6000 fits. A -9999 sentinel, a unit
#: slip or a spike lies thousands of sd out.
Z_GROSS = 10.0
#: Robust sd (1.4826 MAD plus the typical noise) from the median beyond which values are first
#: tested together (a genuine field rarely spans 50 such sd; the test still decides).
RANGE_LIMIT = 50.0
#: Prior probability that a reading is faulty: the prior mean of the fault rate of
#: ``--method mcmc --faulty`` (Beta(20 r, 20 (1 - r)), r = 0.05).
FAULT_RATE = 0.05
#: Fault probability above which a reading is named and left out of the refit (posterior odds
#: 99 : 1 for faulty). With sigma_bad = 10 sigma and the prior 0.05 it is crossed at a
#: leave-one-out |z| of about 4.4, by chance for about 1e-5 of clean readings. Chosen by
#: measurement (bench/bench_calibration.py, 20 trials per family): at 0.9 (|z| 3.9) the step
#: on an arc, the near-rim source and the source + trend families lost coverage and interval
#: score, because a step edge or a source peak looks like a faulty sensor to a smooth prior
#: (step score 0.29 -> 0.46); 0.99 halves that harm and still finds most 10-sd faults and every
#: 15-sd one. Below it the ordinary fit is returned as is.
FLAG_PROBABILITY = 0.99
#: Refits per gross-error round are limited to this many candidates (large problems).
MAX_CANDIDATES = 64


def _design(estimate, problem):
    """Rows of the problem's readings in the estimate's basis (a stage may raise the modes)."""
    if problem.G.shape[1] == len(estimate.mean) or problem.points is None:
        return problem.G
    return estimate.domain.design(problem.points)


def _noise_var(estimate, problem):
    """Noise variance of each reading under the estimate: sigma^2, or the estimate's level."""
    if problem.sigma is not None:
        return problem.sigma**2
    return np.full(problem.n_readings, float(estimate.noise_sd or 0.0) ** 2)


def predictive(estimate, problem):
    """Mean and signal variance of each reading of ``problem`` under ``estimate``.

    Returns
    -------
    mean, var_signal, var_noise : ndarray of shape (m,)
        ``g_i^T c``, ``g_i^T Sigma g_i`` and the noise variance (sigma^2 or the estimate's).
    """
    G = _design(estimate, problem)
    mean = G @ estimate.mean
    var = np.einsum("ij,jk,ik->i", G, estimate.cov, G)
    return mean, np.maximum(var, 0.0), _noise_var(estimate, problem)


def loo_predictive(estimate, problem):
    r"""Exact leave-one-out predictive moments of each reading at the estimate's hyperparameters.

    With hat value :math:`h_i = g_i^\top\Sigma g_i/n_i` (:math:`n_i` the noise variance) and
    residual :math:`r_i`, the prediction of :math:`y_i` from the others has mean
    :math:`y_i - r_i/(1-h_i)` and signal variance :math:`n_i h_i/(1-h_i)` (the Gaussian
    leave-one-out identities, Sundararajan & Keerthi 2001).

    Returns
    -------
    mean, var_signal, var_noise : ndarray of shape (m,)
    """
    mean, var, nv = predictive(estimate, problem)
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.clip(np.where(nv > 0, var / nv, 1.0), 0.0, 1.0 - 1e-12)
        r = problem.y - mean
        return problem.y - r / (1 - h), nv * h / (1 - h), nv


def fault_probabilities(y, mean, var_signal, var_noise, sigma_bad, rate=FAULT_RATE, df=None):
    """Posterior probability that each reading is faulty (Hogg, Bovy & Lang 2010, eq. 17).

    ``rate N(y | mean, v + sigma_bad^2) / [rate N(. | ., v + sigma_bad^2)
    + (1 - rate) N(y | mean, v + var_noise)]``, computed in logs. With ``df`` (the noise level
    estimated from the readings on ``df`` residual dof) the good component is the Student-t
    predictive of that plug-in (Gelman et al., *Bayesian Data Analysis*, 3rd ed., §3.2): the
    Gaussian one names a clean sensor in about 10 % of rings of 28 (measured).
    """
    d = np.asarray(y, float) - mean
    vg = var_signal + var_noise
    vb = var_signal + sigma_bad**2
    if df is None:
        lg = -0.5 * (np.log(vg) + d**2 / vg)
    else:
        sd = np.sqrt(vg)
        lg = stats.t.logpdf(d / sd, df) - np.log(sd) + 0.5 * np.log(2 * np.pi)
    lg = lg + np.log1p(-rate)
    lb = np.log(rate) - 0.5 * (np.log(vb) + d**2 / vb)
    return np.exp(lb - np.logaddexp(lg, lb))


def without(problem, drop):
    """Return the problem without the readings ``drop`` (bool mask), kept on record as gaps."""
    drop = np.asarray(drop, bool)
    sub = problem.subset(~drop)
    if not drop.any():
        return sub
    gp = problem.gap_points
    pts = problem.points[drop] if problem.points is not None else None
    gap_points = pts if gp is None or len(gp) == 0 else (
        gp if pts is None else np.concatenate([gp, pts]))
    return dataclasses.replace(sub, gap_sensor=np.concatenate(
        [np.asarray(problem.gap_sensor, dtype=object), problem.sensor[drop].astype(object)]
    ).astype(str), gap_points=gap_points)


def _quiet(fit_fn, problem):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_fn(problem)


def _from_rest(fit_fn, problem, keep, i):
    """Predictive mean, signal and noise variance of reading i from the kept others (a refit)."""
    rest = keep.copy()
    rest[i] = False
    est = _quiet(fit_fn, problem.subset(rest))
    mu, var, nv = predictive(est, problem.subset(np.array([i])))
    return est, float(mu[0]), float(var[0]), float(nv[0]), est.df


def _range_candidates(problem, keep):
    y = problem.y
    med = np.median(y[keep])
    noise = np.median(problem.sigma) if problem.sigma is not None else 0.0
    scale = 1.4826 * np.median(np.abs(y[keep] - med)) + noise
    if scale <= 0:
        return np.zeros_like(keep)
    return keep & (np.abs(y - med) > RANGE_LIMIT * scale)


def _range_screen(problem, fit_fn, keep, limit, z_limit):
    """Values far outside the spread of the rest, tested together against the others' fit."""
    found = {}
    cand = _range_candidates(problem, keep)
    if 0 < cand.sum() <= limit:
        est = _quiet(fit_fn, problem.subset(~cand))
        mu, var, nv = predictive(est, problem)
        z = (problem.y - mu) / np.sqrt(var + nv)
        for i in np.flatnonzero(cand & (np.abs(z) > z_limit)):
            found[int(i)] = float(z[i])
            keep[i] = False
    return found


def range_screen(problem, fit_fn, z_limit=Z_GROSS, max_fraction=0.25):
    """Gross errors among values far outside the ring's spread, in one refit (module Notes).

    The first step of :func:`screen` alone: values more than :data:`RANGE_LIMIT` robust sd
    from the median are left out together, the stage refitted on the rest, and each of them
    whose standardised error from that fit exceeds ``z_limit`` is a gross error.

    Returns
    -------
    dict
        Index of each gross error -> its standardised error from the rest.
    """
    m = problem.n_readings
    keep = np.ones(m, bool)
    limit = max(min(int(max_fraction * m), m - 4), 0)
    return _range_screen(problem, fit_fn, keep, limit, z_limit)


def _candidates(problem, keep):
    idx = np.flatnonzero(keep)
    if idx.size > MAX_CANDIDATES:  # large problems: the most extreme values only
        dev = np.abs(problem.y[idx] - np.median(problem.y[idx]))
        idx = idx[np.argsort(-dev)[:MAX_CANDIDATES]]
    return idx


def screen(problem, fit_fn, *, z_limit=Z_GROSS, threshold=FLAG_PROBABILITY, rate=FAULT_RATE,
           max_fraction=0.25):
    """Gross errors and faulty readings by leave-one-out refits (module Notes).

    Each round refits the stage without each kept reading in turn (hyperparameters re-chosen
    on the others) and takes the reading's predictive density from that fit; the worst reading
    is excluded if it is a gross error (``|z| > z_limit``) or else probably faulty (fault
    probability above ``threshold``), and the round repeated (backward deletion, one reading
    at a time, so that one bad reading does not drag others out with it).

    Parameters
    ----------
    problem : LinearProblem
    fit_fn : callable
        ``fit_fn(problem) -> Estimate`` (the stage, hyperparameters chosen on each call).
    z_limit : float, default=Z_GROSS
    threshold : float, default=FLAG_PROBABILITY
    rate : float, default=FAULT_RATE
    max_fraction : float, default=0.25
        At most this share of the readings is excluded (and always 4 readings are kept).

    Returns
    -------
    gross : dict
        Index of each gross error -> its standardised error from the rest.
    faulty : list of int
        Indices of the readings excluded as probably faulty, in the order found.
    probability : ndarray of shape (m,)
        Fault probability of each kept reading from the last round (NaN for excluded ones).
    """
    m = problem.n_readings
    keep = np.ones(m, bool)
    limit = max(min(int(max_fraction * m), m - 4), 0)
    gross = _range_screen(problem, fit_fn, keep, limit, z_limit)
    faulty = []
    prob = np.full(m, np.nan)
    while True:
        idx = _candidates(problem, keep)
        rows = [_from_rest(fit_fn, problem, keep, i) for i in idx]
        if not rows:
            break
        mu, var, nv = (np.array([r[k] for r in rows]) for k in (1, 2, 3))
        y = problem.y[idx]
        z = (y - mu) / np.sqrt(var + nv)
        # the typical noise level from the refit without the worst reading (the cleanest)
        sigma_bad = sigma_bad_for(rows[int(np.argmax(np.abs(z)))][0], problem.subset(keep))
        prob[:] = np.nan
        df = None if problem.sigma is not None else np.array([r[4] or np.inf for r in rows])
        prob[idx] = fault_probabilities(y, mu, var, nv, sigma_bad, rate, df)
        if len(gross) + len(faulty) >= limit:
            break
        far = _range_candidates(problem, keep)[idx]
        zg = np.where(far, np.abs(z), 0.0)
        j = int(np.argmax(zg))
        if zg[j] > z_limit:
            gross[int(idx[j])] = float(z[j])
        elif prob[idx].max() > threshold:
            j = int(np.argmax(prob[idx]))
            faulty.append(int(idx[j]))
        else:
            break
        keep[idx[j]] = False
    return gross, faulty, prob


def sigma_bad_for(estimate, problem):
    """Return the sd of a faulty reading: the larger of sd(y) and 10 times the typical noise.

    As ``--method mcmc --faulty`` sets it (:mod:`invert.stages.mcmc.augmented`).
    """
    typical = float(np.median(problem.sigma)) if problem.sigma is not None else \
        float(estimate.noise_sd or 0.0)
    return max(float(np.std(problem.y)), 10.0 * typical)


def gross_notes(problem, gross):
    """One warning per gross error (``gross``: index -> standardised error from the rest)."""
    sensors = np.asarray(problem.sensor).astype(str)
    return [f"reading of sensor {sensors[i]} ({problem.y[i]:.6g}) lies {abs(z):.3g} "
            f"predictive sd from what the other readings allow: excluded as a gross error "
            f"(a sentinel value, a unit slip or a spike?)" for i, z in sorted(gross.items())]


def robust_fit(problem, fit_fn):
    """Gross-error and faulty-reading screening around ``fit_fn`` (module Notes).

    Returns
    -------
    estimate : Estimate
        With warnings naming each excluded reading and ``info["robust"]`` (what was done).
        The ordinary estimate ``fit_fn(problem)``, unchanged, when nothing is excluded.
    problem : LinearProblem
        The readings for the diagnostics: without the gross errors (moved to the gaps), but
        with the readings left out as faulty, so that the model check still sees them. A
        feature the prior does not expect (an interior source) can make a reading look
        faulty; the check on all non-gross readings still fails then.
    """
    if problem.n_readings < 6:
        return fit_fn(problem), problem
    gross, faulty, prob = screen(problem, fit_fn)
    if not gross and not faulty:
        return fit_fn(problem), problem
    drop = np.zeros(problem.n_readings, bool)
    drop[list(gross) + faulty] = True
    final = without(problem, drop)
    est = fit_fn(final)  # with its own warnings, as an ordinary fit
    drop[faulty] = False
    checked = without(problem, drop)
    sensors = np.asarray(problem.sensor).astype(str)
    if faulty:  # the probability of each excluded faulty reading given the final fit
        mu, var, nv = predictive(est, problem.subset(np.array(faulty)))
        prob[faulty] = fault_probabilities(problem.y[faulty], mu, var, nv,
                                           sigma_bad_for(est, final), FAULT_RATE, est.df)
    notes = gross_notes(problem, gross)
    notes += [f"sensor {sensors[i]} is probably faulty (fault probability {prob[i]:.3g} under "
              f"the good/faulty mixture): its reading ({problem.y[i]:.6g}) was left out of "
              f"the fit" for i in faulty]
    for n in notes:
        warnings.warn(n, FitWarning, stacklevel=2)
    info = dict(est.info)
    info["robust"] = {
        "gross_errors": {sensors[i]: float(z) for i, z in sorted(gross.items())},
        "faulty": {sensors[i]: float(prob[i]) for i in faulty},
        "method": f"leave-one-out refits: gross error if |z| > {Z_GROSS:g}; good/faulty "
                  f"mixture (fault prior {FAULT_RATE:g}, sd of a faulty reading max(sd(y), "
                  f"10 noise sd)), faulty if its probability > {FLAG_PROBABILITY:g}",
    }
    est = dataclasses.replace(est, info=info, warnings=tuple(est.warnings) + tuple(notes))
    return est, checked
