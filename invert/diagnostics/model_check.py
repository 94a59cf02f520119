r"""Model check: whether the readings fit a source-free harmonic field.

Under the model, readings are Gaussian with covariance :math:`C = G_1\Sigma_{p,1}G_1^\top +
\Sigma_e` (the broad mean level treated as a fixed effect); the residual quadratic form, a
focused test for a uniform interior source and leave-one-out predictions follow
(:func:`model_check`). Only ``domain.source_field`` (the field of a uniform source with zero
rim values) is asked of the domain.

References
----------
.. [1] S. Sundararajan and S. S. Keerthi, "Predictive approaches for choosing hyperparameters in
       Gaussian processes", Neural Computation 13:1103–1118, 2001.
       doi:10.1162/08997660151134343
.. [2] A. Vehtari, A. Gelman and J. Gabry, "Practical Bayesian model evaluation using
       leave-one-out cross-validation and WAIC", Statistics and Computing 27:1413–1432, 2017.
       doi:10.1007/s11222-016-9696-4
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import stats

from ..prior import SmoothnessPrior
from ..stages._search import grid_then_refine
from ._common import estimate_design, prior_params
from .contrasts import Contrasts

__all__ = ["CHECK_ALPHA", "ModelCheck", "model_check", "psis_loo"]

#: Significance level of the model check (the usual 5 %).
CHECK_ALPHA = 0.05


@dataclass(frozen=True)
class ModelCheck:
    """Result of :func:`model_check`.

    Attributes
    ----------
    flagged : bool or None
        True when the readings contradict a harmonic field at level ``alpha``; None when
        nothing was testable.
    verdict : str
        One plain sentence for the user.
    chi2, chi2_dof, chi2_pvalue : float
        Residual quadratic form, its degrees of freedom and upper-tail p-value (NaN when the
        noise level was estimated from the same residuals).
    source_excess, source_se, source_stat, source_pvalue : float
        Estimated excess at the centre over the harmonic field for a uniform source, its
        standard error, the z (or t) statistic and its two-sided p-value (NaN with no interior
        reading).
    source_df : float or None
        Degrees of freedom of the t statistic (None: normal).
    alpha : float
    sensor : ndarray of str
    std_residual : ndarray
        Residual of the fitted mean over the noise sd, per reading.
    loo_mean, loo_sd, loo_z : ndarray
        Leave-one-out predictive mean and sd of each reading (including its noise) and the
        reading's standardised distance from it.
    suspect : list of str
        Sensors whose |loo_z| exceeds the Bonferroni bound at ``alpha``.
    notes : list of str
    pareto_k : ndarray or None
        PSIS-LOO Pareto k per reading when a sampled posterior was given.
    tau, noise_sd : float
        Prior scale and noise sd (NaN when given per reading) under which the check was made.
    hyperparameters : str
        How they were chosen.
    """

    flagged: bool | None
    verdict: str
    chi2: float
    chi2_dof: float
    chi2_pvalue: float
    source_excess: float
    source_se: float
    source_stat: float
    source_pvalue: float
    source_df: float | None
    alpha: float
    sensor: np.ndarray
    std_residual: np.ndarray
    loo_mean: np.ndarray
    loo_sd: np.ndarray
    loo_z: np.ndarray
    suspect: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    pareto_k: np.ndarray | None = None
    tau: float = np.nan
    noise_sd: float = np.nan
    hyperparameters: str = ""

    def to_dict(self) -> dict:
        """Plain summary for ``summary.json`` (per-sensor arrays as a list of records)."""
        d = {
            "flagged": self.flagged,
            "verdict": self.verdict,
            "alpha": self.alpha,
            "chi2": self.chi2,
            "chi2_dof": self.chi2_dof,
            "chi2_pvalue": self.chi2_pvalue,
            "source_excess_at_centre": self.source_excess,
            "source_excess_se": self.source_se,
            "source_statistic": self.source_stat,
            "source_df": self.source_df,
            "source_pvalue": self.source_pvalue,
            "suspect_sensors": list(self.suspect),
            "tau": self.tau,
            "noise_sd": self.noise_sd,
            "hyperparameters": self.hyperparameters,
            "notes": list(self.notes),
            "sensors": [
                {"sensor": str(s), "std_residual": float(r), "loo_mean": float(m),
                 "loo_sd": float(sd), "loo_z": float(z)}
                for s, r, m, sd, z in zip(self.sensor, self.std_residual, self.loo_mean,
                                          self.loo_sd, self.loo_z)
            ],
        }
        if self.pareto_k is not None:
            for rec, k in zip(d["sensors"], self.pareto_k):
                rec["pareto_k"] = float(k)
        return d


def _reml_contrasts(estimate, problem, noise, src):
    # Error contrasts of the whitened readings with the degree-0 column(s) as fixed effects
    # (invert.diagnostics.contrasts: m x m eigendecomposition for few readings, blocked
    # coefficient-space factorisation when readings outnumber coefficients).
    G, deg = estimate_design(estimate, problem)
    s_, _ = prior_params(estimate)
    d = estimate.domain
    shape = SmoothnessPrior(float(s_), 1.0).variances(d.eigenvalues, d.degrees)
    return Contrasts(G, deg == 0, np.sqrt(shape), noise, problem.y, src)


def _reml_scale(kappa, w, known, x0, perp2=0.0, n=None):
    # Restricted ML of x = tau^2 (noise known) or x = tau^2/sigma^2 (noise level profiled out),
    # on a log grid around the fit's value, then refined; returns (x, at_bound). The n - len(w)
    # contrast directions with kappa = 0 enter through their sum of squares perp2.
    n = len(w) if n is None else n

    def f(lx):
        dd = 1.0 / (np.exp(lx) * kappa + 1.0)
        if known:
            return float(-np.sum(np.log(dd)) + np.sum(w**2 * dd) + perp2)
        return float(n * np.log((np.sum(w**2 * dd) + perp2) / n) - np.sum(np.log(dd)))

    grid = np.log(x0) + np.linspace(-20.0, 20.0, 161)
    vals = np.array([f(g) for g in grid])
    i = int(np.argmin(vals))
    if i in (0, len(grid) - 1):
        return float(np.exp(grid[i])), True
    # Bounded Brent between the neighbours of the best grid point (xatol 1e-8 in log x); the
    # three-point grid has its minimum in the middle, so the bounds are those neighbours.
    lx, _ = grid_then_refine(f, grid[i - 1:i + 2], xatol=1e-8)
    return float(np.exp(lx)), False


def _check_scale(con, known, tau_fit, noise_fit, refit, notes):
    # (x, sig2, how): the prior scale ratio x and noise variance sig2 the check is made under.
    kappa, w = con.kappa, con.w
    if refit:
        x0 = float(tau_fit) ** 2 / (1.0 if known else noise_fit**2) if tau_fit else 1.0
        x, at_bound = _reml_scale(kappa, w, known, x0, con.perp2, con.n)
        dd = 1.0 / (x * kappa + 1.0)
        sig2 = 1.0 if known else float((np.sum(w**2 * dd) + con.perp2) / con.n)
        how = "prior scale" + ("" if known else " and noise level") + \
            " by restricted maximum likelihood, smoothness as fitted"
        if at_bound:
            notes.append("the readings prefer an unbounded prior scale (they ask to be "
                         "interpolated), so the chi-square test has little power here")
        return x, sig2, how
    sig2 = 1.0 if known else noise_fit**2
    return float(tau_fit) ** 2 / sig2, sig2, "as fitted by the stage"


def _source_test(src, sPs, sPy, q, dof, known):
    # GLS estimate of the uniform-source excess kappa = s'P0y / s'P0s, its se, the z (or
    # studentised t) statistic, two-sided p-value and t dof (model_check Notes).
    kappa = se = stat = src_p = np.nan
    t_df = None
    if not (src.any() and sPs > 0):
        return kappa, se, stat, src_p, t_df
    kappa = sPy / sPs
    se = 1.0 / np.sqrt(sPs)
    z = kappa / se
    if known:
        stat, src_p = z, float(2 * stats.norm.sf(abs(z)))
    else:
        t_df = float(dof - 1)
        if t_df >= 1:
            scale = np.sqrt(max(q - z**2, 0.0) / t_df)
            se *= scale
            stat = kappa / se if se > 0 else np.inf
            src_p = float(2 * stats.t.sf(abs(stat), t_df))
    return kappa, se, stat, src_p, t_df


def _verdict(chi2, chi2_p, dof, kappa, se, src_p, alpha):
    # (flagged, verdict): Bonferroni over the available p-values.
    pvals = [p for p in (chi2_p, src_p) if np.isfinite(p)]
    if not pvals:
        return None, "The model check could not be made: nothing in these readings can test it."
    flagged = bool(min(pvals) < alpha / len(pvals))
    parts = []
    if np.isfinite(chi2_p):
        parts.append(f"chi2 of residuals and smoothness penalty = {chi2:.1f} on {dof} dof, "
                     f"p = {chi2_p:.3g}")
    if np.isfinite(src_p):
        parts.append(f"interior excess over the harmonic field {kappa:.3g} ± {se:.2g} at the "
                     f"centre, p = {src_p:.3g}")
    if flagged:
        return flagged, ("MODEL CHECK FAILED: the readings contradict a source-free harmonic "
                         "field (" + "; ".join(parts) + "). Intervals from this fit are not to be "
                         "trusted; look for a heat source, a transient or faulty sensors.")
    return flagged, "The readings are consistent with a harmonic field (" + "; ".join(parts) + ")."


def model_check(estimate, problem, *, alpha=CHECK_ALPHA, refit=True) -> ModelCheck:
    r"""Do the readings fit a harmonic field? Residual chi-square, a source test and LOO.

    Parameters
    ----------
    estimate : Estimate
        Needs the prior's ``s`` (and ``tau`` with ``refit=False``) in ``info``.
    problem : LinearProblem
    alpha : float, default=0.05
        Significance level of the whole check.
    refit : bool, default=True
        Choose the prior scale (and a common noise level) by restricted maximum likelihood
        for the check, with ``s`` as fitted. ``False`` uses the estimate's ``tau`` and noise
        sd as they are; a stage that limited its parameter (e.g. to keep residual degrees of
        freedom) then makes the chi-square test reject harmonic data.

    Returns
    -------
    ModelCheck

    Notes
    -----
    Under the model the readings are :math:`y \sim N(X_0\beta, C)`,
    :math:`C = G_1\Sigma_{p,1}G_1^\top + \Sigma_e`, with the degree-0 column :math:`X_0` as a
    fixed effect (its prior is broad). With :math:`P_0` the precision after profiling out
    :math:`\beta`:

    * residual chi-square :math:`\chi^2 = y^\top P_0 y \sim \chi^2_{m-p_0}`. It equals the
      whitened residual sum of squares plus the penalty of the fit; it is reported only when
      the noise sd is given (an estimated noise level is fitted to these very residuals);
    * uniform source: :math:`-\Delta u = q` makes :math:`u = -qr^2/4 + \text{harmonic}`, i.e.
      readings exceed the harmonic field by :math:`\kappa s_i`, :math:`s_i = 1-\rho_i^2`,
      :math:`\kappa = qR^2/4` (zero on the rim, largest at the centre). The generalised least
      squares estimate is :math:`\hat\kappa = s^\top P_0 y / s^\top P_0 s` with
      :math:`\operatorname{se} = (s^\top P_0 s)^{-1/2}`; :math:`z = \hat\kappa/\operatorname{se}`
      is standard normal under the model. With the noise level unknown (:math:`C = \sigma^2B`)
      the statistic is studentised by the residual after the source term,
      :math:`\hat\sigma^2 = (y^\top P_0 y - z^2)/(m - p_0 - 1)`, and is :math:`t_{m-p_0-1}`.
      Rim readings alone cannot test it: any rim profile is the trace of a harmonic field;
    * the check fails when either p-value is below :math:`\alpha/2` (Bonferroni), or the one
      available below :math:`\alpha`;
    * leave-one-out (Sundararajan & Keerthi 2001 [1]_): predictive mean
      :math:`y_i - [P_0y]_i/[P_0]_{ii}`, variance :math:`1/[P_0]_{ii}`; the standardised
      distance :math:`[P_0y]_i/\sqrt{[P_0]_{ii}}` equals the fitted residual over its own sd.

    The prior scale is chosen by restricted maximum likelihood on the error contrasts
    :math:`z = Q^\top W y` [2]_ [3]_ (one eigendecomposition serves the search); plugging it in
    makes the tests slightly conservative. If the readings prefer an unbounded scale (they
    ask for interpolation) the chi-square has little power; this is noted. The check is a
    statement about this snapshot; a pass does not prove the field harmonic.

    References
    ----------
    .. [1] S. Sundararajan and S. S. Keerthi, Neural Computation 13:1103–1118, 2001.
           doi:10.1162/08997660151134343
    .. [2] H. D. Patterson and R. Thompson, "Recovery of inter-block information when block
           sizes are unequal", Biometrika 58:545–554, 1971. doi:10.1093/biomet/58.3.545
    .. [3] D. A. Harville, "Maximum likelihood approaches to variance component estimation and
           to related problems", JASA 72:320–338, 1977. doi:10.1080/01621459.1977.10480998
    """
    known = problem.sigma is not None
    m = problem.n_readings
    notes = []
    src = problem.domain.source_field(problem.points)  # 1 - rho^2 on a disk
    src[src < 1e-3] = 0.0  # rim readings (within the rim tolerance) carry no source signal
    con = _reml_contrasts(estimate, problem, problem.sigma if known else np.ones(m), src)
    p0 = con.p0
    if con.n < 2:
        raise ValueError(f"The model check needs at least {p0 + 2} readings. Got {m} instead.")
    _, tau_fit = prior_params(estimate)
    noise_fit = float(estimate.noise_sd or 1.0)
    x, sig2, how = _check_scale(con, known, tau_fit, noise_fit, refit, notes)
    dd = 1.0 / (x * con.kappa + 1.0)
    Py, Psrc, dP = con.precision(dd, sig2)
    tau_chk = float(np.sqrt(x * sig2))
    y = problem.y
    loo_sd = 1.0 / np.sqrt(dP)
    loo_mean = y - Py / dP
    loo_z = Py / np.sqrt(dP)
    G, _ = estimate_design(estimate, problem)
    fitted = G @ (estimate.mean if estimate.draws is None else estimate.draws.mean(axis=0))
    std_res = (y - fitted) / (problem.sigma if known else noise_fit)
    q = float(y @ Py)
    dof = m - p0

    chi2 = chi2_p = np.nan
    if known:
        chi2, chi2_p = q, float(stats.chi2.sf(q, dof))
    else:
        notes.append("the noise level was estimated from these residuals, so their overall "
                     "size cannot be tested; only the source test applies")

    sPs = float(src @ Psrc)
    excess, se, stat, src_p, t_df = _source_test(src, sPs, float(src @ Py), q, dof, known)
    if not (src.any() and sPs > 0):
        notes.append("no interior reading: a uniform heat source inside cannot be told from a "
                     "harmonic field by rim readings alone")
    flagged, verdict = _verdict(chi2, chi2_p, dof, excess, se, src_p, alpha)
    robust = (estimate.info or {}).get("robust") or {}
    gross = ", ".join(robust.get("gross_errors", {}))
    faulty = ", ".join(f"{k} (fault probability {v:.3g})"
                       for k, v in robust.get("faulty", {}).items())
    if gross:
        notes.append(f"checked without the gross errors the fit excluded: {gross}")
        verdict += f" Excluded before the check (gross errors): {gross}."
    if faulty:
        notes.append(f"left out of the fit as probably faulty but kept in this check: {faulty}")
        verdict += f" Left out of the fit as probably faulty (kept in this check): {faulty}."
    # Bonferroni bound on |loo_z| for a single faulty sensor among m.
    bound = stats.norm.isf(alpha / (2 * m))
    suspect = [str(sn) for sn in np.asarray(problem.sensor)[np.abs(loo_z) > bound]]
    pareto_k = None
    post = estimate.extras.get("posterior") if estimate.extras else None
    if post is not None:
        pareto_k, note = psis_loo(post)
        if note:
            notes.append(note)
    return ModelCheck(flagged, verdict, float(chi2), float(dof), float(chi2_p), float(excess),
                      float(se), float(stat), float(src_p), t_df, float(alpha),
                      np.asarray(problem.sensor).astype(str), std_res, loo_mean, loo_sd, loo_z,
                      suspect, notes, pareto_k, tau_chk,
                      np.nan if known else float(np.sqrt(sig2)), how)


def psis_loo(posterior):
    """Pareto k per reading from PSIS-LOO on a sampled posterior with a log_likelihood group.

    Returns ``(pareto_k, note)``: the array (None when unavailable) and a note for the user.

    References
    ----------
    .. [1] A. Vehtari, A. Gelman and J. Gabry, Statistics and Computing 27:1413–1432, 2017.
           doi:10.1007/s11222-016-9696-4
    """
    try:
        import arviz as az

        res = az.loo(posterior, pointwise=True)
        k = np.asarray(getattr(res, "pareto_k")).ravel()
    except Exception as exc:  # the posterior may lack a log_likelihood group
        return None, f"PSIS-LOO not available for this posterior ({exc.__class__.__name__})"
    bad = int(np.sum(k > 0.7))
    note = (f"PSIS-LOO: {bad} reading(s) with Pareto k > 0.7 (influential; their LOO is "
            f"unreliable)") if bad else ""
    return k, note
