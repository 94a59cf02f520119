r"""Depth of information: damping with distance from the rim, resolution, radial sd.

Interior readings see harmonic :math:`n` damped by :math:`\rho^n` (:func:`attenuation`). For
the Gaussian posterior with prior covariance :math:`\Sigma_p`, the model resolution is
:math:`R = I - \Sigma_\text{post}\Sigma_p^{-1}`; with a diagonal prior its diagonal is one minus
the posterior-to-prior variance ratio of each coefficient, and its trace is the effective
number of parameters the data determine (:func:`resolution`). :func:`resolved_degree` and
:func:`radial_sd_profile` use rings of sensors or points, so they need a domain with
``rim_arcs``.

References
----------
.. [1] R. C. Aster, B. Borchers and C. H. Thurber, *Parameter Estimation and Inverse Problems*,
       3rd ed., Elsevier, 2018, §4.4. doi:10.1016/C2015-0-02458-3
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from ..prior import SmoothnessPrior
from ._common import estimate_design, prior_params
from .gaps import require_arcs

__all__ = ["Resolution", "RadialProfile", "attenuation", "prior_variances", "resolution",
           "resolved_degree", "radial_sd_profile"]


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


def prior_variances(estimate) -> np.ndarray:
    """Prior variance of each coefficient, from the ``s`` and ``tau`` the stage recorded.

    A stage that averages over ``(s, tau)`` records the averaged variances
    (``estimate.prior.variances``); they are used as given.

    Sampled hyperparameters (``estimate.prior`` of the MCMC stage) are plugged in at their
    posterior medians.

    Raises
    ------
    ValueError
        If the estimate's ``info`` holds neither.
    """
    given = getattr(estimate.prior, "variances", None)
    if given is not None:  # a stage averaging over (s, tau) records the averaged prior
        return np.asarray(given, float)
    s, tau = prior_params(estimate)
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
    G, _ = estimate_design(estimate, problem)
    noise = problem.sigma if problem.sigma is not None else \
        np.full(problem.n_readings, float(estimate.noise_sd))
    A = np.diag(1.0 / v) + G.T @ (G / noise[:, None] ** 2)
    return linalg.inv(0.5 * (A + A.T), overwrite_a=True)


@dataclass(frozen=True)
class Resolution:
    r"""Per-degree resolution of the coefficients.

    Attributes
    ----------
    degree : ndarray of int, shape (N+1,)
    variance_ratio : ndarray of shape (N+1,)
        Posterior over prior variance, averaged over the columns of each degree.
    resolution : ndarray of shape (N+1,)
        Diagonal of the model resolution averaged by degree, ``1 - variance_ratio``.
    column_resolution : ndarray of shape (n_coef,)
        Diagonal of :math:`R = I - \Sigma_{post}\Sigma_p^{-1}` per column.
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
    Rings run from the inner boundary (``inner_relative_radius``: the centre of a disk, the
    bore of an annulus) to the rim; a domain without ``rim_arcs`` uses its ``rim_circles``.
    The rms over angle on a ring is :math:`(\frac{1}{2\pi}\oint \mathrm{sd}^2\,d\theta)^{1/2}`;
    for a diagonal coefficient posterior with equal variance :math:`p_n` on :math:`a_n, b_n`
    it is :math:`(p_0 + \sum_n \rho^{2n} p_n)^{1/2}`.
    """
    d = estimate.domain
    arcs = getattr(d, "rim_circles", None) if getattr(d, "rim_arcs", None) is None else None
    arcs = require_arcs(d, "radial_sd_profile") if arcs is None else arcs
    # from the centre of a disk (or the bore of an annulus) to the outer rim
    rho = np.linspace(float(getattr(d, "inner_relative_radius", 0.0)), 1.0, n_radii)
    th = np.arange(n_angles) * (2 * np.pi / n_angles)
    R, T = np.meshgrid(rho, th, indexing="ij")
    sd = estimate.at(arcs.ring(R.ravel(), T.ravel())).sd.reshape(n_radii, n_angles)
    return RadialProfile(rho, np.sqrt(np.mean(sd**2, axis=1)), sd.min(axis=1), sd.max(axis=1))
