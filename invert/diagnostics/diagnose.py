r"""Diagnostics of a fit: depth of information, dependence on gaps, exceedance and model check.

Everything here reads an :class:`~invert.problem.Estimate` and the
:class:`~invert.problem.LinearProblem` it came from; it depends on NumPy and SciPy only (arviz
is imported inside :func:`psis_loo`, only when a sampled posterior is present).

Notes
-----
Depth of information. Interior readings see harmonic :math:`n` damped by :math:`\rho^n`
(:func:`attenuation`). For the Gaussian posterior with prior covariance :math:`\Sigma_p`, the
model resolution is :math:`R = I - \Sigma_\text{post}\Sigma_p^{-1}`; with a diagonal prior its
diagonal is one minus the posterior-to-prior variance ratio of each coefficient, and its trace
is the effective number of parameters the data determine (:func:`resolution`).

Dependence on gaps. The value at an interior point is the Poisson-kernel average of the rim
values; the share of that average taken over rim arcs with no working sensor is the harmonic
measure of those arcs (:func:`gap_dependence`).

Model check. Under the model, readings are Gaussian with covariance
:math:`C = G_1\Sigma_{p,1}G_1^\top + \Sigma_e` (the broad mean level treated as a fixed effect);
the residual quadratic form and a focused test for a uniform interior source follow
(:func:`model_check`).

References
----------
.. [1] R. C. Aster, B. Borchers and C. H. Thurber, *Parameter Estimation and Inverse Problems*,
       3rd ed., Elsevier, 2018, §4.4. doi:10.1016/C2015-0-02458-3
.. [2] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, Cambridge University Press, 2005,
       ch. I. doi:10.1017/CBO9780511546617
.. [3] S. Sundararajan and S. S. Keerthi, "Predictive approaches for choosing hyperparameters in
       Gaussian processes", Neural Computation 13:1103–1118, 2001.
       doi:10.1162/08997660151134343
.. [4] A. Vehtari, A. Gelman and J. Gabry, "Practical Bayesian model evaluation using
       leave-one-out cross-validation and WAIC", Statistics and Computing 27:1413–1432, 2017.
       doi:10.1007/s11222-016-9696-4
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import linalg, optimize, stats

from ..geometry.disk import arc_harmonic_measure
from ..prior import SmoothnessPrior
from ..errors import ModelCheckWarning

__all__ = [
    "Resolution",
    "RadialProfile",
    "GapDependence",
    "MaxExceedance",
    "ModelCheck",
    "Diagnostics",
    "attenuation",
    "prior_variances",
    "resolution",
    "resolved_degree",
    "radial_sd_profile",
    "unsensed_arcs",
    "gap_dependence",
    "half_mass_width",
    "exceedance_probability",
    "max_exceedance",
    "model_check",
    "psis_loo",
    "diagnose",
]

#: Significance level of the model check (the usual 5 %).
CHECK_ALPHA = 0.05




# ---------------------------------------------------------------------------------------------
# depth of information
# ---------------------------------------------------------------------------------------------
def attenuation(rho, degrees):
    r"""Damping :math:`\rho^n` of harmonic degree ``n`` at relative radius ``rho``.

    Parameters
    ----------
    rho : array_like
        Relative radius :math:`r/R` in [0, 1].
    degrees : array_like of int

    Returns
    -------
    ndarray of shape ``np.broadcast(rho[:, None], degrees[None, :])``
    """
    rho = np.atleast_1d(np.asarray(rho, float))
    n = np.atleast_1d(np.asarray(degrees))
    return rho[:, None] ** n[None, :]


def _prior_params(estimate):
    # (s, tau) the stage recorded; for sampled hyperparameters, their posterior medians.
    return estimate.prior.s, estimate.prior.tau


def prior_variances(estimate) -> np.ndarray:
    """Prior variance of each coefficient, from the ``s`` and ``tau`` the stage recorded.

    Sampled hyperparameters (``estimate.prior`` of the MCMC stage) are plugged in at their
    posterior medians.

    Raises
    ------
    ValueError
        If the estimate's ``info`` holds neither.
    """
    s, tau = _prior_params(estimate)
    if s is None or tau is None:
        raise ValueError("The estimate must carry the prior's 's' and 'tau' (Estimate.prior). "
                         f"Got s={s!r}, tau={tau!r} instead.")
    d = estimate.domain
    return SmoothnessPrior(float(s), float(tau)).variances(d.eigenvalues, d.degrees)


def _posterior_cov(estimate, problem=None) -> np.ndarray:
    # Gaussian(-equivalent) posterior covariance. The scale matrix of a Student-t posterior is
    # the Gaussian posterior at the estimated noise level. For draws (hyperparameters sampled),
    # the conditional Gaussian posterior at the plug-in hyperparameters of prior_variances:
    # the draws' own covariance mixes over s and tau and is not comparable with one prior.
    if estimate.cov is not None:
        return estimate.cov
    if problem is None:
        raise ValueError("resolution of a sampled estimate needs the problem (readings); got "
                         "problem=None.")
    v = prior_variances(estimate)
    G, _ = _design(estimate, problem)
    noise = problem.sigma if problem.sigma is not None else \
        np.full(problem.n_readings, float(estimate.noise_sd))
    A = np.diag(1.0 / v) + G.T @ (G / noise[:, None] ** 2)
    return linalg.inv(0.5 * (A + A.T), overwrite_a=True)


@dataclass(frozen=True)
class Resolution:
    """Per-degree resolution of the coefficients.

    Attributes
    ----------
    degree : ndarray of int, shape (N+1,)
    variance_ratio : ndarray of shape (N+1,)
        Posterior over prior variance, averaged over the columns of each degree.
    resolution : ndarray of shape (N+1,)
        Diagonal of the model resolution averaged by degree, ``1 - variance_ratio``.
    column_resolution : ndarray of shape (n_coef,)
        Diagonal of :math:`R = I - \\Sigma_{post}\\Sigma_p^{-1}` per column.
    effective_dof : float
        Trace of :math:`R`, the number of parameters the data determine.
    """

    degree: np.ndarray
    variance_ratio: np.ndarray
    resolution: np.ndarray
    column_resolution: np.ndarray
    effective_dof: float


def resolution(estimate, problem=None) -> Resolution:
    r"""Model resolution and posterior-to-prior variance ratio per harmonic degree.

    Parameters
    ----------
    estimate : Estimate
        Needs the prior's ``s`` and ``tau`` in ``info`` (or sampled hyperparameters).
    problem : LinearProblem, optional
        Required for a sampled estimate (``draws``).

    Returns
    -------
    Resolution

    Notes
    -----
    .. math:: R = I - \Sigma_\text{post}\Sigma_p^{-1},\qquad
              R_{jj} = 1 - \frac{(\Sigma_\text{post})_{jj}}{v_j},\qquad
              \operatorname{tr} R = \text{effective degrees of freedom}.

    For a Student-t posterior (noise level estimated) the scale matrix is used: it is the
    Gaussian posterior at the estimated noise level, for which the identity holds. For a
    sampled estimate (``problem`` then required) it is the Gaussian posterior conditional on
    the posterior-median hyperparameters. For all
    sensors on the rim, equally spaced, with :math:`2N+1 < M` and equal noise :math:`\sigma`,
    :math:`G^\top G = \operatorname{diag}(M, M/2, \ldots)` and the ratio is
    :math:`1/(1 + M v_n/(2\sigma^2))` for :math:`n \ge 1` [1]_.

    References
    ----------
    .. [1] R. C. Aster, B. Borchers and C. H. Thurber, *Parameter Estimation and Inverse
           Problems*, 3rd ed., 2018, §4.4.
    """
    v = prior_variances(estimate)
    post = np.diag(_posterior_cov(estimate, problem))
    col_ratio = post / v
    col_res = 1.0 - col_ratio
    deg = np.asarray(estimate.domain.degrees)
    count = np.bincount(deg)
    ratio = np.bincount(deg, weights=col_ratio) / count
    return Resolution(
        degree=np.arange(count.size),
        variance_ratio=ratio,
        resolution=1.0 - ratio,
        column_resolution=col_res,
        effective_dof=float(col_res.sum()),
    )


def resolved_degree(estimate, rho, *, n_readings, noise_sd=None) -> np.ndarray:
    r"""Highest degree that ``n_readings`` sensors on a ring at relative radius ``rho`` resolve.

    Parameters
    ----------
    estimate : Estimate
        Supplies the prior variances :math:`v_n` (from ``estimate.prior``).
    rho : array_like
        Relative radii in (0, 1].
    n_readings : int
        Number of readings ``M``.
    noise_sd : float, optional
        Noise sd :math:`\sigma` of one reading; default ``estimate.noise_sd``.

    Returns
    -------
    ndarray of int
        For each radius, the largest :math:`n` with :math:`\rho^{2n} v_n M/(2\sigma^2) \ge 1`,
        or 0 if none.

    Notes
    -----
    A ring of :math:`M` equally spaced sensors at radius :math:`\rho` measures the pair
    :math:`(a_n, b_n)` with data precision :math:`M\rho^{2n}/(2\sigma^2)` each; harmonic
    :math:`n` is *resolved* when that exceeds the prior precision :math:`1/v_n`, i.e. when its
    model resolution is at least 1/2 (the data, not the prior, decide it). The damping
    :math:`\rho^{2n}` is the smoothing effect of distance from the rim: the resolved degree
    falls as sensors move inward. At :math:`\rho = 1` this is the degree at which
    :func:`resolution` crosses 1/2 for a full ring.
    """
    sigma = float(estimate.noise_sd if noise_sd is None else noise_sd)
    v = prior_variances(estimate)
    deg = np.asarray(estimate.domain.degrees)
    n = np.arange(1, deg.max() + 1)
    vn = np.array([v[deg == k][0] for k in n])
    rho = np.atleast_1d(np.asarray(rho, float))
    snr = attenuation(rho, n) ** 2 * vn[None, :] * n_readings / (2 * sigma**2)
    ok = snr >= 1.0
    # ok is decreasing in n for each rho (v_n and rho^2n both decrease), so count the run.
    return np.where(ok.any(axis=1), np.sum(np.cumprod(ok, axis=1), axis=1), 0)


@dataclass(frozen=True)
class RadialProfile:
    """Posterior sd of the field on rings: ``rho`` and the rms, min and max over angle."""

    rho: np.ndarray
    rms_sd: np.ndarray
    min_sd: np.ndarray
    max_sd: np.ndarray


def radial_sd_profile(estimate, *, n_radii=41, n_angles=180) -> RadialProfile:
    r"""Posterior sd of the field against relative radius, summarised over angle.

    Notes
    -----
    The rms over angle on a ring is :math:`(\frac{1}{2\pi}\oint \mathrm{sd}^2\,d\theta)^{1/2}`;
    for a diagonal coefficient posterior with equal variance :math:`p_n` on :math:`a_n, b_n`
    it is :math:`(p_0 + \sum_n \rho^{2n} p_n)^{1/2}`.
    """
    d = estimate.domain
    rho = np.linspace(0.0, 1.0, n_radii)
    th = np.arange(n_angles) * (2 * np.pi / n_angles)
    R, T = np.meshgrid(rho, th, indexing="ij")
    sd = estimate.at(d.from_polar(R.ravel(), T.ravel())).sd.reshape(n_radii, n_angles)
    return RadialProfile(rho, np.sqrt(np.mean(sd**2, axis=1)), sd.min(axis=1), sd.max(axis=1))


# ---------------------------------------------------------------------------------------------
# dependence on gaps
# ---------------------------------------------------------------------------------------------
def _rim_angles(domain, points, tol=1e-3):
    if points is None or len(points) == 0:
        return np.array([])
    p = np.asarray(points, float)
    rho, th = domain.to_polar(p)
    return np.mod(th[rho >= 1 - tol], 2 * np.pi)


def _circular_gaps(angles):
    # Sorted angles and the ccw gap from each to the next (wrapping).
    a = np.sort(np.mod(angles, 2 * np.pi))
    return a, np.diff(np.append(a, a[0] + 2 * np.pi))


def unsensed_arcs(problem, *, spacing=None) -> np.ndarray:
    r"""Rim arcs farther than half a sensor spacing from every working rim sensor.

    Parameters
    ----------
    problem : LinearProblem
        Working sensors are ``problem.points``; failed ones (gaps) ``problem.gap_points``.
    spacing : float, optional
        Nominal sensor spacing in radians; default the median ccw gap between consecutive rim
        sensors, working or failed.

    Returns
    -------
    ndarray of shape (n_arcs, 2)
        ccw arcs ``(alpha, beta)`` in radians with ``alpha < beta`` (``beta`` may exceed
        :math:`2\pi`). Empty when the working sensors cover the rim; the whole rim
        ``(0, 2*pi)`` when there is no working rim sensor.
    """
    d = problem.domain
    work = _rim_angles(d, problem.points)
    every = np.concatenate([work, _rim_angles(d, problem.gap_points)])
    if work.size == 0:
        return np.array([[0.0, 2 * np.pi]])
    if spacing is None:
        spacing = float(np.median(_circular_gaps(every)[1])) if every.size > 1 else 2 * np.pi
    half = 0.5 * spacing
    a, gap = _circular_gaps(work)
    # Arcs narrower than 0.1 % of the spacing are rounding of typed sensor positions (6 digits
    # give ~1e-5 of a spacing), not gaps.
    wide = gap > 2 * half + 1e-3 * spacing
    return np.column_stack([a[wide] + half, a[wide] + gap[wide] - half])


def half_mass_width(rho):
    r"""Width (radians) of the rim arc, centred below a point at relative radius ``rho``, that
    holds half of its Poisson-kernel mass.

    Notes
    -----
    The symmetric arc :math:`|\varphi-\theta| < a` has harmonic measure
    :math:`\frac{2}{\pi}\arctan(k\tan\frac a2)`, :math:`k = (1+\rho)/(1-\rho)` [1]_; setting it
    to 1/2 gives :math:`a = 2\arctan\frac{1-\rho}{1+\rho}` and width
    :math:`4\arctan\frac{1-\rho}{1+\rho}` (:math:`\pi` at the centre, 0 at the rim).

    References
    ----------
    .. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, 2005, ch. I.
    """
    rho = np.asarray(rho, float)
    return 4.0 * np.arctan((1.0 - rho) / (1.0 + rho))


@dataclass(frozen=True)
class GapDependence:
    """Share of each point's Poisson-kernel mass over unsensed arcs.

    Attributes
    ----------
    points : ndarray of shape (n_points, 2)
    share : ndarray of shape (n_points,)
        Harmonic measure of the union of unsensed arcs, in [0, 1].
    half_mass_width_deg : ndarray of shape (n_points,)
        Width of the rim arc below the point holding half its kernel mass, degrees.
    arcs : ndarray of shape (n_arcs, 2)
        The unsensed arcs, radians.
    """

    points: np.ndarray
    share: np.ndarray
    half_mass_width_deg: np.ndarray
    arcs: np.ndarray


def gap_dependence(problem, points, *, arcs=None) -> GapDependence:
    r"""How much the estimate at ``points`` rests on rim arcs that no working sensor covers.

    Parameters
    ----------
    problem : LinearProblem
    points : array_like of shape (n_points, 2)
        Points inside the disk.
    arcs : ndarray of shape (n_arcs, 2), optional
        Arcs to use instead of :func:`unsensed_arcs`.

    Notes
    -----
    .. math:: \text{share}(z) = \sum_k \omega(z; \alpha_k, \beta_k)
              = \sum_k \int_{\alpha_k}^{\beta_k} P(z;\varphi)\,d\varphi,

    with the closed-form harmonic measure :func:`~invert.geometry.disk.arc_harmonic_measure` [1]_
    (the arcs do not overlap). Points on the rim are moved in by 1e-12 R.

    References
    ----------
    .. [1] J. B. Garnett and D. E. Marshall, *Harmonic Measure*, 2005, ch. I.
    """
    d = problem.domain
    arcs = unsensed_arcs(problem) if arcs is None else np.asarray(arcs, float).reshape(-1, 2)
    pts = np.asarray(points, float)
    rho, th = d.to_polar(pts)
    rho = np.minimum(rho, 1 - 1e-12)
    z = rho * np.exp(1j * th)
    share = np.zeros(len(pts))
    for a, b in arcs:
        share += arc_harmonic_measure(z, a, b)
    return GapDependence(pts, np.clip(share, 0.0, 1.0), np.rad2deg(half_mass_width(rho)), arcs)


# ---------------------------------------------------------------------------------------------
# exceedance
# ---------------------------------------------------------------------------------------------
def exceedance_probability(estimate, points, threshold) -> np.ndarray:
    r"""Posterior probability that the field exceeds ``threshold`` at each point.

    Notes
    -----
    Gaussian: :math:`1 - \Phi((T - \bar u)/\mathrm{sd})`; Student-t: the same with the t
    distribution and the scale :math:`\sqrt{h^\top\Sigma h}`; draws: the fraction of draws
    above :math:`T`.
    """
    pts = np.asarray(points, float)
    if estimate.draws is not None:
        U = estimate.draws @ estimate.domain.design(pts).T
        return np.mean(U > threshold, axis=0)
    H = estimate.domain.design(pts)
    mean = H @ estimate.mean
    scale = np.sqrt(np.sum((H @ estimate._root) ** 2, axis=1))  # sqrt(h' Sigma h)
    z = (threshold - mean) / np.where(scale > 0, scale, np.finfo(float).tiny)
    return stats.norm.sf(z) if estimate.df is None else stats.t.sf(z, estimate.df)


@dataclass(frozen=True)
class MaxExceedance:
    """Probability that the maximum of the field anywhere in the region exceeds a threshold.

    Attributes
    ----------
    threshold : float
    probability : float
    mc_se : float
        Monte-Carlo standard error :math:`\\sqrt{p(1-p)/n}`.
    n_draws, n_rim : int
    max_lower, max_median, max_upper : float
        Central ``level`` interval and median of the maximum.
    level : float
    """

    threshold: float
    probability: float
    mc_se: float
    n_draws: int
    n_rim: int
    max_lower: float
    max_median: float
    max_upper: float
    level: float


def max_exceedance(estimate, threshold, *, level=0.9, n_draws=4000, n_rim=None,
                   rng=None) -> MaxExceedance:
    r"""Probability that the field exceeds ``threshold`` somewhere in the region.

    Parameters
    ----------
    estimate : Estimate
    threshold : float
    level : float, default=0.9
        Probability of the reported interval of the maximum.
    n_draws : int, default=4000
        Posterior draws of the coefficients (:meth:`Estimate.sample`); Monte-Carlo error is
        at most 0.008 at this size.
    n_rim : int, optional
        Rim grid size (``domain.rim_grid(n_rim)``); default ``max(720, 16 * n_modes)`` on a disk
        (at least 16 points per shortest wavelength), 360 on a ball.
    rng : None, int or Generator

    Notes
    -----
    By the maximum principle a harmonic field attains its maximum over the closed region on
    the rim, so the maximum of each draw is taken over a fine rim grid; no interior grid is
    needed (Evans, *PDE*, §2.2.3). The probability is the fraction of draws whose rim maximum
    exceeds :math:`T`.
    """
    rng = np.random.default_rng(rng)
    d = estimate.domain
    if n_rim is None:
        # Disk: 16 points per shortest wavelength; ball: the 5-degree latitude/longitude grid.
        n_rim = int(max(720, 16 * d.n_modes)) if getattr(d, "kind", "disk") == "disk" else 360
    pts, _ = d.rim_grid(n_rim)
    H = d.design(pts)
    top = np.empty(n_draws)
    for start in range(0, n_draws, 1000):
        c = estimate.sample(min(1000, n_draws - start), rng)
        top[start:start + len(c)] = (c @ H.T).max(axis=1)
    p = float(np.mean(top > threshold))
    lo, med, hi = np.quantile(top, [(1 - level) / 2, 0.5, (1 + level) / 2])
    return MaxExceedance(float(threshold), p, float(np.sqrt(max(p * (1 - p), 0) / n_draws)),
                         int(n_draws), int(n_rim), float(lo), float(med), float(hi), level)


# ---------------------------------------------------------------------------------------------
# model check
# ---------------------------------------------------------------------------------------------
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


def _reading_radius(problem):
    d = problem.domain
    p = np.asarray(problem.points, float)
    return np.linalg.norm(p - np.asarray(d.center, float)[None, :], axis=1) / d.radius


def _design(estimate, problem):
    # The estimate's own basis (a stage may fit at another truncation than the problem's).
    d = estimate.domain
    if problem.G.shape[1] == len(d.degrees):
        return problem.G, np.asarray(d.degrees)
    return d.design(problem.points), np.asarray(d.degrees)


def _reml_basis(estimate, problem, noise):
    # Whitened readings W y, W = diag(1/noise). With the degree-0 column(s) X0 as fixed
    # effects, the error contrasts z = Q' W y (Q: orthonormal basis of the complement of W X0)
    # are N(0, tau^2 Q' K Q + I), K = W G1 V1 G1' W the prior part for tau = 1. One eigen-
    # decomposition Q' K Q = U diag(kappa) U' serves every tau: with B = Q U, w = B' W y,
    # P0 = W B diag(1/(tau^2 kappa + 1)) B' W (Patterson & Thompson 1971; Harville 1977).
    G, deg = _design(estimate, problem)
    s_, _ = _prior_params(estimate)
    d = estimate.domain
    shape = SmoothnessPrior(float(s_), 1.0).variances(d.eigenvalues, d.degrees)
    fixed = deg == 0
    wt = 1.0 / noise
    A = (wt[:, None] * G[:, ~fixed]) * np.sqrt(shape[~fixed])
    X = wt[:, None] * G[:, fixed]
    Qf, _ = linalg.qr(X, mode="full")
    Q = Qf[:, X.shape[1]:]
    AQ = Q.T @ A
    kappa, U = linalg.eigh(AQ @ AQ.T)
    B = Q @ U
    return B, np.clip(kappa, 0.0, None), B.T @ (wt * problem.y), wt, int(fixed.sum())


def _reml_scale(kappa, w, known, x0):
    # Restricted ML of x = tau^2 (noise known) or x = tau^2/sigma^2 (noise level profiled out),
    # on a log grid around the fit's value, then refined; returns (x, at_bound).
    n = len(w)

    def f(lx):
        dd = 1.0 / (np.exp(lx) * kappa + 1.0)
        if known:
            return float(-np.sum(np.log(dd)) + np.sum(w**2 * dd))
        return float(n * np.log(np.sum(w**2 * dd) / n) - np.sum(np.log(dd)))

    grid = np.log(x0) + np.linspace(-20.0, 20.0, 161)
    vals = np.array([f(g) for g in grid])
    i = int(np.argmin(vals))
    if i in (0, len(grid) - 1):
        return float(np.exp(grid[i])), True
    res = optimize.minimize_scalar(f, bounds=(grid[i - 1], grid[i + 1]), method="bounded",
                                   options={"xatol": 1e-8})
    return float(np.exp(res.x if res.fun <= vals[i] else grid[i])), False


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
    B, kappa, w, wt, p0 = _reml_basis(estimate, problem, problem.sigma if known else np.ones(m))
    n_c = len(w)
    if n_c < 2:
        raise ValueError(f"The model check needs at least {p0 + 2} readings. Got {m} instead.")
    _, tau_fit = _prior_params(estimate)
    noise_fit = float(estimate.noise_sd or 1.0)
    if refit:
        x0 = float(tau_fit) ** 2 / (1.0 if known else noise_fit**2) if tau_fit else 1.0
        x, at_bound = _reml_scale(kappa, w, known, x0)
        dd = 1.0 / (x * kappa + 1.0)
        sig2 = 1.0 if known else float(np.sum(w**2 * dd) / n_c)
        how = "prior scale" + ("" if known else " and noise level") + \
            " by restricted maximum likelihood, smoothness as fitted"
        if at_bound:
            notes.append("the readings prefer an unbounded prior scale (they ask to be "
                         "interpolated), so the chi-square test has little power here")
    else:
        sig2 = 1.0 if known else noise_fit**2
        x = float(tau_fit) ** 2 / sig2
        dd = 1.0 / (x * kappa + 1.0)
        how = "as fitted by the stage"
    P0 = wt[:, None] * ((B * dd) @ B.T) * wt[None, :] / sig2
    P0 = 0.5 * (P0 + P0.T)
    tau_chk = float(np.sqrt(x * sig2))
    y = problem.y
    Py = P0 @ y
    dP = np.diag(P0)
    loo_sd = 1.0 / np.sqrt(dP)
    loo_mean = y - Py / dP
    loo_z = Py / np.sqrt(dP)
    G, _ = _design(estimate, problem)
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

    s = 1.0 - _reading_radius(problem) ** 2
    s[s < 1e-3] = 0.0  # rim readings (within the rim tolerance) carry no source signal
    sPs = float(s @ P0 @ s)
    kappa = se = stat = src_p = np.nan
    t_df = None
    if s.any() and sPs > 0:
        kappa = float(s @ Py) / sPs
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
    else:
        notes.append("no interior reading: a uniform heat source inside cannot be told from a "
                     "harmonic field by rim readings alone")

    pvals = [p for p in (chi2_p, src_p) if np.isfinite(p)]
    if not pvals:
        flagged = None
        verdict = "The model check could not be made: nothing in these readings can test it."
    else:
        cut = alpha / len(pvals)
        flagged = bool(min(pvals) < cut)
        parts = []
        if np.isfinite(chi2_p):
            parts.append(f"chi2 of residuals and smoothness penalty = {chi2:.1f} on {dof} dof, "
                         f"p = {chi2_p:.3g}")
        if np.isfinite(src_p):
            parts.append(f"interior excess over the harmonic field {kappa:.3g} ± {se:.2g} at the "
                         f"centre, p = {src_p:.3g}")
        if flagged:
            verdict = ("MODEL CHECK FAILED: the readings contradict a source-free harmonic field ("
                       + "; ".join(parts) + "). Intervals from this fit are not to be trusted; "
                       "look for a heat source, a transient or faulty sensors.")
        else:
            verdict = "The readings are consistent with a harmonic field (" + "; ".join(parts) + ")."
    # Bonferroni bound on |loo_z| for a single faulty sensor among m.
    bound = stats.norm.isf(alpha / (2 * m))
    suspect = [str(sn) for sn in np.asarray(problem.sensor)[np.abs(loo_z) > bound]]
    pareto_k = None
    post = estimate.extras.get("posterior") if estimate.extras else None
    if post is not None:
        pareto_k, note = psis_loo(post)
        if note:
            notes.append(note)
    return ModelCheck(flagged, verdict, float(chi2), float(dof), float(chi2_p), float(kappa),
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


# ---------------------------------------------------------------------------------------------
# everything for a fit
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Diagnostics:
    """All diagnostics of one fit, as used by the report and ``summary.json``."""

    resolution: Resolution | None
    resolved_degree_at: dict
    radial: RadialProfile | None
    gaps: GapDependence | None
    check: ModelCheck | None
    max_exceed: MaxExceedance | None
    threshold: float | None
    warnings: tuple = ()
    gap_labels: tuple = ()

    def to_dict(self) -> dict:
        """The ``diagnostics`` block of ``summary.json``."""
        out = {}
        if self.check is not None:
            out["model_check"] = self.check.to_dict()
        if self.resolution is not None:
            r = self.resolution
            out["depth"] = {
                "effective_dof": r.effective_dof,
                "variance_ratio_by_degree": r.variance_ratio.tolist(),
                "resolved_degree_at_relative_radius": self.resolved_degree_at,
            }
        if self.radial is not None:
            out.setdefault("depth", {})["posterior_sd_rms_at_relative_radius"] = {
                f"{rr:.2f}": float(v) for rr, v in zip(self.radial.rho[::10],
                                                       self.radial.rms_sd[::10])}
        if self.gaps is not None:
            out["gaps"] = {
                "unsensed_arcs_deg": np.rad2deg(self.gaps.arcs).tolist(),
                "share_at_centre": float(np.sum(arc_harmonic_measure(
                    0.0, self.gaps.arcs[:, 0], self.gaps.arcs[:, 1]))),
                "points": [
                    {"label": lab, "x": float(p[0]), "y": float(p[1]), "share": float(sh),
                     "half_mass_arc_deg": float(w)}
                    for lab, p, sh, w in zip(self.gap_labels, self.gaps.points,
                                             self.gaps.share, self.gaps.half_mass_width_deg)],
                "definition": "share: Poisson-kernel mass over rim arcs farther than half a "
                              "sensor spacing from any working rim sensor; half_mass_arc_deg: "
                              "width of the rim arc below the point holding half its kernel "
                              "mass",
            }
        if self.max_exceed is not None:
            e = self.max_exceed
            out["exceedance"] = {
                "threshold": e.threshold,
                "probability_max_exceeds": e.probability,
                "mc_se": e.mc_se,
                "n_draws": e.n_draws,
                "max_median": e.max_median,
                "max_interval": [e.max_lower, e.max_upper],
                "method": "posterior draws, maximum over a fine rim grid (maximum principle)",
            }
        return out


def diagnose(estimate, problem, *, level=0.9, threshold=None, query=None, labels=None,
             rng=None) -> Diagnostics:
    """Compute every diagnostic of a fit that the domain supports.

    Parameters
    ----------
    estimate : Estimate
    problem : LinearProblem
    level : float, default=0.9
        Level of the interval of the maximum (with ``threshold``).
    threshold : float, optional
        Adds the probability that the maximum exceeds it (:func:`max_exceedance`).
    query : ndarray of shape (n_points, 2), optional
        Points whose dependence on gaps is reported (the centre always is).
    labels : sequence of str, optional
        Names of the query points.
    rng : None, int or Generator
        For the exceedance draws.

    Returns
    -------
    Diagnostics

    Notes
    -----
    On a ball only the model check and the exceedance probability are computed (the depth and
    gap diagnostics are written for the disk). Warnings found (a failed model check, suspect
    sensors) are returned in ``warnings`` and issued as :class:`ModelCheckWarning`.
    """
    d = estimate.domain
    disk = getattr(d, "kind", "disk") == "disk"
    has_prior = None not in _prior_params(estimate)
    res = radial = gaps = check = None
    at = {}
    warn = []
    if has_prior and disk:
        res = resolution(estimate, problem)
        radii = (1.0, 0.9, 0.75, 0.5, 0.25)
        deg = resolved_degree(estimate, radii, n_readings=problem.n_readings)
        at = {f"{r:.2f}": int(k) for r, k in zip(radii, deg)}
    names = ["centre"]
    if disk:
        radial = radial_sd_profile(estimate)
        pts = d.from_polar(0.0, 0.0)
        if query is not None and len(query):
            q = np.asarray(query, float)
            qn = [str(x) for x in labels] if labels is not None else \
                [f"p{k + 1}" for k in range(len(q))]
            if np.any(np.hypot(*(q - pts).T) < 1e-9 * d.radius):
                pts, names = q, qn  # the user already asks about the centre
            else:
                pts, names = np.vstack([pts, q]), names + qn
        gaps = gap_dependence(problem, pts)
    if has_prior and problem.n_readings < 3:
        warn.append(f"model check skipped: it needs at least 3 readings, got "
                    f"{problem.n_readings}; nothing here tests whether the field is harmonic")
    elif has_prior:
        check = model_check(estimate, problem)
        if check.flagged:
            warn.append(check.verdict)
        if check.suspect:
            warn.append("sensor(s) " + ", ".join(check.suspect) + " read far from what the other "
                        "sensors predict (leave-one-out); check them for faults")
    mx = None
    if threshold is not None:
        mx = max_exceedance(estimate, float(threshold), level=level, rng=rng)
    for w in warn:
        warnings.warn(w, ModelCheckWarning, stacklevel=2)
    return Diagnostics(res, at, radial, gaps, check, mx, threshold, tuple(warn), tuple(names))
