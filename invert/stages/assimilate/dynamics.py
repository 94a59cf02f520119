r"""The linear-Gaussian dynamics of the coefficients over time.

Notes
-----
State: the coefficient vector :math:`c_k` at frame time :math:`t_k`. Readings
:math:`y_k = H c_k + e_k`, :math:`e_k \sim N(0, R)`, :math:`R = \operatorname{diag}(r_i)`; a
missing reading drops its row (a frame with none skips the update).

Dynamics over a step :math:`\Delta_k = t_k - t_{k-1}`, per coefficient :math:`j` with prior
(stationary) variance :math:`v_j = \tau^2(1+\lambda_{n_j})^{-s}` and time scale :math:`T`:

.. math::
   c_{k,j} = f_j c_{k-1,j} + w_{k,j},\quad f_j = e^{-\Delta_k/T},\quad
   \operatorname{Var} w_{k,j} = v_j\,(1 - e^{-2\Delta_k/T})

(an Ornstein–Uhlenbeck process per harmonic whose stationary law is the smoothness prior, so
the process noise depends on degree through the prior shape and grows with the time step). The
mean level :math:`a_0` follows a random walk, :math:`f = 1`, :math:`\operatorname{Var} w =
2\tau^2\Delta_k/T` (the short-time diffusion of a degree-0 harmonic). Irregular steps and gaps
in time only change :math:`f` and :math:`Q`.

References
----------
.. [1] S. Särkkä, *Bayesian Filtering and Smoothing*, Cambridge University Press, 2013, ch. 4.
       doi:10.1017/CBO9781139344203
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

__all__ = ["CoefficientDynamics"]


@dataclass(frozen=True)
class CoefficientDynamics:
    r"""The linear-Gaussian state-space model of the coefficients over time.

    Parameters
    ----------
    H : ndarray of shape (n_sensors, n_coef)
        Design matrix of all sensors (rows drop out when a reading is missing).
    noise_var : ndarray of shape (n_sensors,)
        Noise variance :math:`r_i` of each sensor's reading.
    prior_var : ndarray of shape (n_coef,)
        Prior (stationary) variance :math:`v_j` of each coefficient; the random-walk columns
        use it only as the initial variance.
    drift_var : ndarray of shape (n_coef,)
        Variance that sets the process noise: :math:`v_j` for the OU columns, :math:`\tau^2` for
        the random-walk columns.
    random_walk : ndarray of bool, shape (n_coef,)
        Columns following a random walk (the mean level).
    time_scale : float
        Time scale :math:`T` of the dynamics, in the unit of the frame times.
    """

    H: np.ndarray
    noise_var: np.ndarray
    prior_var: np.ndarray
    drift_var: np.ndarray
    random_walk: np.ndarray
    time_scale: float

    def __post_init__(self):
        if not (np.isfinite(self.time_scale) and self.time_scale > 0):
            raise ValueError(f"The 'time_scale' parameter of CoefficientDynamics must be a "
                             f"float > 0. Got {self.time_scale!r} instead.")

    @classmethod
    def from_prior(cls, H, noise_var, shape, degrees, *, tau2, time_scale, mean_var=None):
        r"""Dynamics whose stationary law is the smoothness prior ``tau2 * shape``.

        Parameters
        ----------
        H, noise_var : see the class.
        shape : ndarray of shape (n_coef,)
            Prior variance pattern with ``tau = 1`` (:meth:`SmoothnessPrior.shape`).
        degrees : ndarray of int, shape (n_coef,)
        tau2 : float
            Prior scale :math:`\tau^2`.
        time_scale : float
        mean_var : float, optional
            Initial variance of the mean level; default ``tau2 * shape`` at degree 0.
        """
        degrees = np.asarray(degrees)
        rw = degrees == 0
        prior = tau2 * np.asarray(shape, float)
        if mean_var is not None:
            prior = np.where(rw, mean_var, prior)
        # degree-0 drift uses the degree-0 smoothness weight (1 + 0)^(-s) = 1, i.e. tau^2
        drift = np.where(rw, tau2, prior)
        return cls(np.asarray(H, float), np.asarray(noise_var, float), prior, drift, rw,
                   float(time_scale))

    @property
    def n_coef(self) -> int:
        """Number of coefficients (state dimension)."""
        return self.H.shape[1]

    def transition(self, dt):
        """Diagonals of :math:`F` and :math:`Q` for a step ``dt`` (``dt = nan``: no step)."""
        if not np.isfinite(dt):
            return np.ones(self.n_coef), np.zeros(self.n_coef)
        T = self.time_scale
        e = np.exp(-dt / T)
        f = np.where(self.random_walk, 1.0, e)
        q = np.where(self.random_walk, self.drift_var * 2.0 * dt / T,
                     self.drift_var * -np.expm1(-2.0 * dt / T))
        return f, q

    def with_time_scale(self, time_scale):
        """Return the same model with another time scale."""
        return replace(self, time_scale=float(time_scale))
