r"""Smoothness prior on the rim function and the choice of truncation degree.

Notes
-----
Degree-:math:`n` coefficients are independent with variance

.. math:: v_n = \tau^2 (1 + \lambda_n)^{-s},

where :math:`\lambda_n` is the Laplace–Beltrami eigenvalue of degree :math:`n` on the rim
(:math:`n^2` on the circle, :math:`n(n+1)` on the sphere). On the circle this is a Matérn
Gaussian process with :math:`\nu = s - 1/2` [1]_; pointwise variance is finite for
:math:`s > 1/2` (circle) or :math:`s > 1` (sphere). The mean level :math:`a_0` gets a broad
prior, standard deviation ``mean_scale * tau``. Tikhonov regularisation with penalty
:math:`\alpha \sum_j c_j^2 / v_j` is the same model with :math:`\alpha = \sigma^2/\tau^2`.

References
----------
.. [1] V. Borovitskiy, A. Terenin, P. Mostowsky and M. P. Deisenroth, "Matérn Gaussian processes
       on Riemannian manifolds", NeurIPS 2020.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SmoothnessPrior", "truncation_degree"]

#: Prior sd of the mean level relative to tau. Large enough to act as a flat prior on any
#: realistic offset while keeping the standard-form transformation invertible.
MEAN_SCALE = 1e4


@dataclass(frozen=True)
class SmoothnessPrior:
    """Sobolev-type smoothness prior on the rim Fourier coefficients.

    Parameters
    ----------
    s : float, default=2.0
        Smoothness order; larger is smoother. Must exceed ``dim/2`` of the rim (1/2 on a
        circle, 1 on a sphere) for finite pointwise variance.
    tau : float, default=1.0
        Scale of the fluctuations about the mean level, in field units.
    mean_scale : float, default=MEAN_SCALE
        Prior sd of the mean level divided by ``tau``.
    """

    s: float = 2.0
    tau: float = 1.0
    mean_scale: float = MEAN_SCALE

    def __post_init__(self):
        if not (np.isfinite(self.s) and self.s > 0.5):
            raise ValueError(f"The 's' parameter must be a float > 0.5. Got {self.s} instead.")
        if not (np.isfinite(self.tau) and self.tau > 0):
            raise ValueError(f"The 'tau' parameter must be a float > 0. Got {self.tau} instead.")

    def shape(self, eigenvalues, degrees) -> np.ndarray:
        """Prior variances with ``tau = 1``: ``(1 + lambda_n)**(-s)``, mean level broad."""
        v = (1.0 + np.asarray(eigenvalues, float)) ** (-self.s)
        return np.where(np.asarray(degrees) == 0, self.mean_scale**2, v)

    def variances(self, eigenvalues, degrees) -> np.ndarray:
        """Prior variance of each coefficient."""
        return self.tau**2 * self.shape(eigenvalues, degrees)

    def point_variance(self, domain, n_max: int = 100000) -> float:
        r"""Prior variance of the rim field about its mean level, averaged over the rim.

        Parameters
        ----------
        domain : Domain
            Supplies ``rim_mean_square(n)`` (the sum over the columns of degree ``n`` of their
            mean square on the rim) and ``degree_eigenvalue(n)``.
        n_max : int, default=100000
            Highest degree summed.

        Returns
        -------
        float
            :math:`\tau^2 \sum_{n=1}^{n_{max}} w_n (1 + \lambda_n)^{-s}`, :math:`w_n` the rim
            mean square of degree :math:`n` (1 on the circle, :math:`2\ell+1` on the sphere).
        """
        n = np.arange(1, n_max + 1)
        weight = domain.rim_mean_square(n)
        return float(self.tau**2 * np.sum(weight * (1 + domain.degree_eigenvalue(n)) ** -self.s))


def truncation_degree(domain, s, *, tol=1e-4, minimum=8, maximum=256):
    r"""Smallest degree :math:`N` whose omitted prior variance on the rim is below ``tol``.

    The omitted share is :math:`\sum_{n>N} m_n (1+\lambda_n)^{-s} / \sum_{n\ge1} m_n
    (1+\lambda_n)^{-s}`, with :math:`m_n` the multiplicity of degree :math:`n`. Inside the
    region harmonic :math:`n` is further damped by :math:`\rho^n`, so the share there is smaller.

    Parameters
    ----------
    domain : Domain
        Supplies ``degree_multiplicity`` and ``degree_eigenvalue``.
    s : float
        Smoothness order of the prior.
    tol : float, default=1e-4
        Largest acceptable omitted share of rim variance (about 1 % of the rim sd).
    minimum, maximum : int
        Bounds on the result.

    Returns
    -------
    int
    """
    n = np.arange(1, 200001)
    w = domain.degree_multiplicity(n) * (1 + domain.degree_eigenvalue(n)) ** (-float(s))
    tail = np.cumsum(w[::-1])[::-1]  # tail[k] = sum_{n >= k+1} w
    share = tail / tail[0]
    # share[N] = omitted share when keeping degrees 1..N
    ok = np.flatnonzero(share[1:] <= tol)
    N = int(ok[0]) + 1 if ok.size else maximum
    return int(min(max(N, minimum), maximum))
