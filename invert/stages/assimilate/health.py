r"""Sensor health: per-sensor offsets as random-walk states, and faulty readings down-weighted.

Notes
-----
Offsets (bias states, Simon 2006, §7.1). Each sensor :math:`i` reads
:math:`y_i = h_i^\top c + o_i + e_i`, :math:`o = B u`, and the state becomes :math:`(c, u)`.
An offset common to every sensor is the mean level :math:`a_0` (every design row has a 1 in
that column), so the offsets need a reference (:func:`offset_basis`):

- anchored (the layout marks some sensors ``trusted``): trusted sensors have no offset,
  every other sensor its own, :math:`B = [e_i]_{i \text{ not trusted}}`; the trusted sensors
  fix the mean level, and the field is not biased by the others' offsets;
- zero sum (no sensor marked): :math:`B` an orthonormal basis of the vectors with zero sum
  (:func:`contrast_basis`, :math:`n \times (n-1)`). An estimated offset is then the sensor's
  offset relative to the average of all sensors: a true offset :math:`\delta` on one of
  :math:`n` sensors appears as :math:`\delta(1 - 1/n)` there and :math:`-\delta/n` on the
  others, and the field's mean level takes :math:`\delta/n` (a bias the field's intervals
  do not include).

Because :math:`B` is orthonormal, a prior :math:`u \sim N(0, \sigma_o^2 I)` gives
:math:`o \sim N(0, \sigma_o^2 (I - \mathbf{1}\mathbf{1}^\top/n))`, and a random walk
:math:`u_k = u_{k-1} + w_k`, :math:`\operatorname{Var} w_k = \rho^2 \Delta_k / T I` (``rho``
the sd of an offset's change over one time scale :math:`T` of the dynamics) keeps the
transition and process noise diagonal: the augmented model is the kernel's model with
:math:`n - 1` extra random-walk columns (drift variance :math:`\rho^2/2`, since the kernel's
random-walk noise is :math:`2 d \Delta/T`) and design rows :math:`[h_i^\top, B_i]`. The
smoothed offsets are linear functionals :math:`o_i = e_i^\top B u`, evaluated by the smoother
as extra query rows :math:`[0, B_i]`.

Faulty readings (a weighted-likelihood update, Ting, Theodorou & Schaal 2007; the weight as
the posterior probability of a good reading under a two-component predictive mixture, as in
the variational treatment of Agamennoni, Nieto & Nebot 2012, here one pass from the
prediction). With the scalar innovation :math:`\nu` and its variance :math:`s = h^\top P h +
r_i`,

.. math::
   w = \frac{(1-\varepsilon) N(\nu; 0, s)}{(1-\varepsilon) N(\nu; 0, s)
       + \varepsilon N(\nu; 0, s + b_i)},\qquad r_i \to r_i / w,

so a reading that the prediction finds improbable enters with a large variance (and barely
moves the state) instead of being used at face value or silently dropped; :math:`1 - w` is
its fault probability. The decision depends only on the prediction, so the smoother's
recomputed forward pass makes the same decisions and uses the same effective variances.
:math:`b_i = (\kappa \sigma_i)^2` with :math:`\kappa` = ``fault_scale``.

References
----------
.. [1] D. Simon, *Optimal State Estimation*, Wiley, 2006 (augmented states for biases, §7.1).
       doi:10.1002/0470045345
.. [2] J.-A. Ting, E. Theodorou and S. Schaal, "A Kalman filter for robust outlier detection",
       IEEE/RSJ IROS 2007, pp. 1514–1519. doi:10.1109/IROS.2007.4399158
.. [3] G. Agamennoni, J. I. Nieto and E. M. Nebot, "Approximate inference in state-space
       models with heavy-tailed noise", IEEE Trans. Signal Processing 60:5024–5037, 2012.
       doi:10.1109/TSP.2012.2208106
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import null_space

from .kernel import KernelModel

__all__ = ["HealthSettings", "contrast_basis", "offset_basis", "augment", "offset_rows"]

#: Default prior probability that a reading is faulty.
FAULT_PRIOR = 0.01
#: Default sd of a faulty reading's extra error, in noise sds of its sensor.
FAULT_SCALE = 30.0
#: Default prior sd of an offset, in (median) noise sds.
OFFSET_SD = 10.0
#: Default sd of an offset's change over one time scale of the dynamics, in noise sds.
OFFSET_RATE = 1.0


@dataclass(frozen=True)
class HealthSettings:
    """Settings of the sensor-health model (readings' units; None: the defaults above).

    Parameters
    ----------
    offset_sd : float, optional
        Prior sd of each offset (default ``OFFSET_SD`` median noise sds).
    offset_rate : float, optional
        Sd of an offset's change over one time scale ``T`` (default ``OFFSET_RATE`` median
        noise sds).
    fault_prior : float, default=FAULT_PRIOR
    fault_scale : float, default=FAULT_SCALE
    """

    offset_sd: float | None = None
    offset_rate: float | None = None
    fault_prior: float = FAULT_PRIOR
    fault_scale: float = FAULT_SCALE

    def resolved(self, noise_var):
        """Return ``(offset_sd, offset_rate)`` with the defaults filled in from the noise."""
        sd = float(np.sqrt(np.median(noise_var)))
        return (OFFSET_SD * sd if self.offset_sd is None else float(self.offset_sd),
                OFFSET_RATE * sd if self.offset_rate is None else float(self.offset_rate))


def contrast_basis(n):
    r"""Orthonormal basis of the vectors of length ``n`` with zero sum.

    Returns
    -------
    ndarray of shape (n, n - 1)
        :math:`B^\top B = I`, :math:`B^\top \mathbf{1} = 0`, :math:`B B^\top = I -
        \mathbf{1}\mathbf{1}^\top / n` (the null space of :math:`\mathbf{1}^\top` by SVD).
    """
    return null_space(np.ones((1, int(n))))


def offset_basis(n, trusted=None):
    """Return the columns ``B`` of ``o = B u``: anchored to ``trusted`` sensors, else zero sum.

    Parameters
    ----------
    n : int
        Number of sensors.
    trusted : ndarray of bool, shape (n,), optional
        Sensors without an offset; None or none marked: the zero-sum basis.

    Returns
    -------
    ndarray of shape (n, k)
        Orthonormal columns (``k = n - 1`` for zero sum, the untrusted count when anchored).

    Raises
    ------
    ValueError
        When every sensor is trusted (no offset left to estimate).
    """
    if trusted is None or not np.any(trusted):
        return contrast_basis(n)
    trusted = np.asarray(trusted, bool)
    if trusted.all():
        raise ValueError("every sensor of the layout is marked trusted: no offset is left to "
                         "estimate (mark the suspect sensors trusted=0)")
    return np.eye(n)[:, ~trusted]


def augment(model, settings=None, trusted=None):
    """Return the kernel model of the coefficients and the sensor offsets.

    Parameters
    ----------
    model : CoefficientDynamics
        With its time scale set.
    settings : HealthSettings, optional
    trusted : ndarray of bool, shape (n_sensors,), optional
        Anchored offsets (see :func:`offset_basis`).

    Returns
    -------
    KernelModel
        State ``(c, u)``: ``model.n_coef`` coefficients then the offset columns of
        :func:`offset_basis`; mean-level columns those of ``model``.
    """
    settings = HealthSettings() if settings is None else settings
    if not 0.0 <= settings.fault_prior < 1.0:
        raise ValueError(f"The 'fault_prior' parameter must be in [0, 1). Got "
                         f"{settings.fault_prior!r} instead.")
    ns, p = model.H.shape
    B = offset_basis(ns, trusted)
    sd, rate = settings.resolved(model.noise_var)
    k = B.shape[1]
    km = KernelModel.build(np.hstack([model.H, B]), model.noise_var,
                           np.r_[model.prior_var, np.full(k, sd**2)],
                           np.r_[model.drift_var, np.full(k, 0.5 * rate**2)],
                           np.r_[model.random_walk, np.ones(k, bool)], model.time_scale)
    fault_var = settings.fault_scale**2 * np.asarray(model.noise_var, float)
    return KernelModel(km.H, km.noise_var, km.prior_var, km.drift_var, km.random_walk,
                       km.time_scale, float(settings.fault_prior), fault_var,
                       np.flatnonzero(model.random_walk))


def offset_rows(n_coef, n_sensors, trusted=None):
    """Rows picking each sensor's offset ``o = B u`` out of the augmented state.

    Returns
    -------
    ndarray of shape (n_sensors, n_coef + k)
        ``k`` columns of :func:`offset_basis` (a trusted sensor's row is zero).
    """
    B = offset_basis(n_sensors, trusted)
    return np.hstack([np.zeros((n_sensors, n_coef)), B])
