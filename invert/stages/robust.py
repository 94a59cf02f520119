r"""Gross-error screening and the good/faulty sensor mixture for the default fit.

Two steps wrap any stage fit ``fit_fn(problem) -> Estimate`` (the assembly layer passes the
default Tikhonov stage):

gross errors (:func:`screen_gross`)
    A reading is a gross error when it lies more than :data:`Z_GROSS` predictive sd from what
    the *other* readings predict, with the hyperparameters re-chosen on those others (exact
    leave-one-out refits). Re-choosing matters: one -9999 sentinel among rim readings makes the
    evidence prefer an interpolating fit with a huge prior scale, under which the sentinel
    looks plausible; without it the rest predicts it sharply. The worst reading is excluded and
    the search repeated (backward deletion). Values far outside the spread of the rest (more
    than :data:`RANGE_LIMIT` robust sd from the median) are first tested together, so that two
    sentinels do not hide each other.
faulty sensors (:func:`mixture_em`)
    Each reading is good, :math:`N(y_i\mid g_i^\top c, \sigma_i^2)`, or faulty,
    :math:`N(y_i\mid g_i^\top c, \sigma_{bad}^2)`, with prior fault probability
    :data:`FAULT_RATE` — the model of ``--method mcmc --faulty`` (Hogg, Bovy & Lang 2010 [1]_,
    :mod:`invert.stages.mcmc.augmented`: the prior mean of its fault rate and the same
    :math:`\sigma_{bad} = \max(\operatorname{sd}(y), 10\,\sigma)`). The E-step gives each
    reading's fault probability from its exact leave-one-out predictive density
    :math:`N(y_i\mid\mu_{-i}, v_{-i} + \cdot)` (Sundararajan & Keerthi 2001 [2]_); the M-step
    refits the stage (hyperparameters re-chosen) on the readings not flagged as faulty
    (classification EM, Celeux & Govaert 1992 [3]_; a faulty reading's soft weight
    :math:`\sigma^2/\sigma_{bad}^2 \le 1/100` is nearly zero anyway). When no reading has a
    fault probability above :data:`FLAG_PROBABILITY` (0.9) the ordinary fit is returned
    unchanged.

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

from ..errors import FitWarning

__all__ = ["Z_GROSS", "RANGE_LIMIT", "FAULT_RATE", "FLAG_PROBABILITY", "loo_predictive",
           "predictive", "fault_probabilities", "without", "screen_gross", "mixture_em",
           "robust_fit"]

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
#: 9 : 1 for faulty). With sigma_bad = 10 sigma and the prior 0.05 it is crossed at a
#: leave-one-out |z| of 3.9: by chance for 1e-4 of clean readings, i.e. about 0.3 % of clean
#: rings of 28 sensors and 1 % of 100 (the MCMC stage's naming level 0.5, |z| = 3.26, would
#: name a sensor in 3 % of clean rings of 28; measured in
#: tests/statistical/test_robust_calibration.py). Below it the ordinary fit is returned as is.
FLAG_PROBABILITY = 0.9
#: Iterations of the classification EM (it stops as soon as the flagged set repeats).
MAX_EM_ITER = 10
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


def fault_probabilities(y, mean, var_signal, var_noise, sigma_bad, rate=FAULT_RATE):
    """Posterior probability that each reading is faulty (Hogg, Bovy & Lang 2010, eq. 17).

    ``rate N(y | mean, v + sigma_bad^2) / [rate N(. | ., v + sigma_bad^2)
    + (1 - rate) N(y | mean, v + var_noise)]``, computed in logs.
    """
    d2 = (np.asarray(y) - mean) ** 2
    vg = var_signal + var_noise
    vb = var_signal + sigma_bad**2
    lg = np.log1p(-rate) - 0.5 * (np.log(vg) + d2 / vg)
    lb = np.log(rate) - 0.5 * (np.log(vb) + d2 / vb)
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


def _z_from_rest(fit_fn, problem, keep, i):
    """Standardised error of reading i predicted by the kept readings other than i."""
    rest = keep.copy()
    rest[i] = False
    est = _quiet(fit_fn, problem.subset(rest))
    one = problem.subset(np.array([i]))
    mu, var, nv = predictive(est, one)
    return float((problem.y[i] - mu[0]) / np.sqrt(var[0] + nv[0]))


def _range_candidates(problem, keep):
    y = problem.y
    med = np.median(y[keep])
    noise = np.median(problem.sigma) if problem.sigma is not None else 0.0
    scale = 1.4826 * np.median(np.abs(y[keep] - med)) + noise
    if scale <= 0:
        return np.zeros_like(keep)
    return keep & (np.abs(y - med) > RANGE_LIMIT * scale)


def screen_gross(problem, fit_fn, *, z_limit=Z_GROSS, max_fraction=0.25):
    """Find gross errors by leave-one-out refits (module Notes).

    Parameters
    ----------
    problem : LinearProblem
    fit_fn : callable
        ``fit_fn(problem) -> Estimate`` (the stage, hyperparameters chosen on each call).
    z_limit : float, default=Z_GROSS
    max_fraction : float, default=0.25
        At most this share of the readings is excluded (and always 4 readings are kept).

    Returns
    -------
    dict
        Index of each excluded reading -> its standardised error from the rest.
    """
    m = problem.n_readings
    keep = np.ones(m, bool)
    found = {}
    limit = min(int(max_fraction * m), m - 4)
    cand = _range_candidates(problem, keep)
    if 0 < cand.sum() <= limit:
        est = _quiet(fit_fn, problem.subset(~cand))
        mu, var, nv = predictive(est, problem)
        z = (problem.y - mu) / np.sqrt(var + nv)
        for i in np.flatnonzero(cand & (np.abs(z) > z_limit)):
            found[int(i)] = float(z[i])
            keep[i] = False
    while len(found) < limit:
        idx = np.flatnonzero(keep)
        if idx.size > MAX_CANDIDATES:  # large problems: the most extreme values only
            dev = np.abs(problem.y[idx] - np.median(problem.y[idx]))
            idx = idx[np.argsort(-dev)[:MAX_CANDIDATES]]
        z = np.array([_z_from_rest(fit_fn, problem, keep, i) for i in idx])
        j = int(np.argmax(np.abs(z)))
        if not abs(z[j]) > z_limit:
            break
        found[int(idx[j])] = float(z[j])
        keep[idx[j]] = False
    return found


def sigma_bad_for(estimate, problem):
    """Return the sd of a faulty reading: the larger of sd(y) and 10 times the typical noise.

    As ``--method mcmc --faulty`` sets it (:mod:`invert.stages.mcmc.augmented`).
    """
    typical = float(np.median(problem.sigma)) if problem.sigma is not None else \
        float(estimate.noise_sd or 0.0)
    return max(float(np.std(problem.y)), 10.0 * typical)


def _responsibilities(estimate, problem, flagged, sigma_bad, rate):
    """Fault probabilities: kept readings by leave-one-out, left-out ones by prediction."""
    kept = problem.subset(~flagged)
    out = np.empty(problem.n_readings)
    mu, v, nv = loo_predictive(estimate, kept)
    out[~flagged] = fault_probabilities(kept.y, mu, v, nv, sigma_bad, rate)
    if flagged.any():
        left = problem.subset(flagged)
        mu, v, nv = predictive(estimate, left)
        out[flagged] = fault_probabilities(left.y, mu, v, nv, sigma_bad, rate)
    return out


def mixture_em(problem, fit_fn, estimate=None, *, rate=FAULT_RATE,
               threshold=FLAG_PROBABILITY, max_iter=MAX_EM_ITER):
    """Classification EM for the good/faulty mixture (module Notes).

    Parameters
    ----------
    problem : LinearProblem
    fit_fn : callable
        ``fit_fn(problem) -> Estimate``.
    estimate : Estimate, optional
        The ordinary fit of ``problem`` (computed when omitted).
    rate : float, default=FAULT_RATE
    threshold : float, default=FLAG_PROBABILITY
    max_iter : int, default=MAX_EM_ITER

    Returns
    -------
    estimate : Estimate
        The ordinary fit (the very object) when nothing is flagged, else the refit without the
        flagged readings.
    probability : ndarray of shape (m,)
        Fault probability of every reading.
    flagged : ndarray of bool
    """
    est = estimate if estimate is not None else _quiet(fit_fn, problem)
    sigma_bad = sigma_bad_for(est, problem)
    flagged = np.zeros(problem.n_readings, bool)
    prob = _responsibilities(est, problem, flagged, sigma_bad, rate)
    if not (prob > threshold).any():
        return est, prob, flagged
    seen = set()
    most = max(problem.n_readings - 4, 0)
    for _ in range(max_iter):
        new = prob > threshold
        if new.sum() > most:  # keep the readings most likely good
            new = np.zeros_like(new)
            new[np.argsort(-prob)[:most]] = True
        key = new.tobytes()
        if key in seen:
            break
        seen.add(key)
        flagged = new
        est = _quiet(fit_fn, problem.subset(~flagged))
        prob = _responsibilities(est, problem, flagged, sigma_bad, rate)
    return est, prob, flagged


def robust_fit(problem, fit_fn):
    """Gross-error screening, then the faulty-sensor mixture, around ``fit_fn``.

    Returns
    -------
    estimate : Estimate
        With warnings naming each excluded reading and ``info["robust"]`` (what was done).
        The ordinary estimate, unchanged, when nothing is excluded.
    problem : LinearProblem
        The problem the estimate was fitted to (excluded readings moved to the gaps).
    """
    gross = screen_gross(problem, fit_fn) if problem.n_readings >= 6 else {}
    drop = np.zeros(problem.n_readings, bool)
    drop[list(gross)] = True
    base = without(problem, drop)
    first = fit_fn(base)
    est, prob, flagged = mixture_em(base, fit_fn, first)
    if not gross and not flagged.any():
        return first, problem
    sensors = np.asarray(problem.sensor).astype(str)
    notes = [f"reading of sensor {sensors[i]} ({problem.y[i]:.6g}) lies {abs(z):.3g} "
             f"predictive sd from what the other readings allow: excluded as a gross error "
             f"(a sentinel value, a unit slip or a spike?)" for i, z in sorted(gross.items())]
    names = np.asarray(base.sensor).astype(str)
    notes += [f"sensor {names[i]} is probably faulty (fault probability {prob[i]:.3g} under "
              f"the good/faulty mixture): its reading ({base.y[i]:.6g}) was left out of the fit"
              for i in np.flatnonzero(flagged)]
    final = without(base, flagged)
    if flagged.any():
        est = fit_fn(final)  # with its own warnings, as an ordinary fit
    for n in notes:
        warnings.warn(n, FitWarning, stacklevel=2)
    info = dict(est.info)
    info["robust"] = {
        "gross_errors": {sensors[i]: float(z) for i, z in sorted(gross.items())},
        "faulty": {names[i]: float(prob[i]) for i in np.flatnonzero(flagged)},
        "fault_probability_max": float(prob.max()) if prob.size else 0.0,
        "method": "gross errors by leave-one-out refits (|z| > 10); good/faulty mixture by "
                  "classification EM (fault prior 0.05, sd of a faulty reading "
                  "max(sd(y), 10 noise sd))",
    }
    est = dataclasses.replace(est, info=info, warnings=tuple(est.warnings) + tuple(notes))
    return est, final
