r"""Exact Kalman filter and smoother of the coefficients, compiled (numba), bounded memory.

The same model (:class:`~invert.stages.assimilate.dynamics.CoefficientDynamics`) and the same
answer as the NumPy exact recursion (:func:`~invert.stages.assimilate.filter.filter_segment`
and :func:`~invert.stages.assimilate.smoother.smooth_segment`, run together by
``smoother.run_smoother(model, t, Y, steady_tol=0, max_transient=0)``), at every frame, whatever the
drop-out pattern and the time step: no steady-state shortcut and no approximation. The work
per frame is a few :math:`O(p^2)` vector loops compiled with numba; there is no Python per
frame.

Notes
-----
Model (as in :mod:`.dynamics`): state :math:`c_k \in \mathbb{R}^p` at time :math:`t_k`, readings
:math:`y_k = H c_k + e_k`, :math:`R = \operatorname{diag}(r_i)`; a missing reading (NaN) drops
its row. Over :math:`\Delta_k = t_k - t_{k-1}`: :math:`F = \operatorname{diag}(f_j)`,
:math:`Q = \operatorname{diag}(q_j)` with :math:`f_j = e^{-\Delta_k/T}`, :math:`q_j = v_j(1 -
e^{-2\Delta_k/T})` for the Ornstein–Uhlenbeck columns and :math:`f_j = 1`, :math:`q_j =
2 d_j \Delta_k / T` for the random-walk columns (the mean level). The first frame of the log
starts from :math:`m^-_0 = 0`, :math:`P^-_0 = \operatorname{diag}(v)` (no dynamics step).

Filter. Predict elementwise, :math:`m^- = f \circ m`, :math:`P^-_{ab} = f_a f_b P_{ab} +
\delta_{ab} q_a` (:math:`O(p^2)`). Because :math:`R` is diagonal the update is a sequence of
scalar updates over the observed readings of the frame (Bierman 1977, ch. II; the sequence
gives the same posterior as the block update, and a missing reading costs nothing): for
reading :math:`i` with row :math:`h`,

.. math::
   u = P h,\quad s = h^\top u + r_i,\quad \nu = y_i - h^\top m,\quad k = u/s,\quad
   m \leftarrow m + k\nu,\quad P \leftarrow P - u u^\top / s,

and :math:`P` is symmetrised once per frame. The log-likelihood is the prediction-error
decomposition (Harvey 1989, §3.4): :math:`\sum_k \log N(v_k \mid 0, S_k) = \sum_{k,i}
-\tfrac12(\log 2\pi + \log s_{k,i} + \nu_{k,i}^2/s_{k,i})`, since the sequential innovations
are :math:`S_k = L D L^\top` with :math:`D = \operatorname{diag}(s_{k,i})`; likewise
:math:`v_k^\top S_k^{-1} v_k = \sum_i \nu_{k,i}^2 / s_{k,i}` (per-frame chi-square).

Smoother: the modified Bryson–Frazier form (Bierman 1977, ch. X; Bryson & Frazier 1963), an
adjoint recursion that needs no matrix inverse. With :math:`\tilde\lambda_N = 0`,
:math:`\tilde\Lambda_N = 0` after the last frame, backwards through each scalar update
(:math:`C = I - k h^\top`, processed in reverse order) and each dynamics step:

.. math::
   \lambda \leftarrow C^\top \lambda - h\,\nu/s,\qquad
   \Lambda \leftarrow C^\top \Lambda C + h h^\top / s,\qquad
   \lambda \leftarrow F\lambda,\quad \Lambda \leftarrow F \Lambda F,

where :math:`C^\top\Lambda C = \Lambda - h w^\top - w h^\top + (k^\top w) h h^\top`,
:math:`w = \Lambda k`, is :math:`O(p^2)`. The smoothed moments at frame :math:`k` follow from
the filtered ones and the adjoint :math:`(\tilde\lambda_k, \tilde\Lambda_k)` carried from the
frames after it:

.. math::
   m^s_k = m_k - P_k \tilde\lambda_k,\qquad P^s_k = P_k - P_k \tilde\Lambda_k P_k,

the Rauch–Tung–Striebel moments (with :math:`G_k = P_k F^\top (P^-_{k+1})^{-1}`,
:math:`m^s_{k+1} - m^-_{k+1} = -P^-_{k+1}\hat\lambda_{k+1}` and :math:`\tilde\lambda_k =
F^\top\hat\lambda_{k+1}`). Only :math:`\operatorname{diag}(H_q P^s_k H_q^\top)` and the
variance of the mean-level columns are formed, :math:`O(n_q p^2)` per frame.

Memory. The forward pass keeps the filtered state at checkpoints every ``segment`` frames;
the backward pass recomputes each segment's forward pass from its checkpoint, keeping that
segment's filtered covariances and scalar gains only. With the default ``segment`` of about
:math:`\sqrt{n}` frames the working memory beyond the outputs grows like :math:`\sqrt{n}\,p^2`
(about 50 MB at a million frames of 45 coefficients, padded to 48), against :math:`n p`
for the outputs.

References
----------
.. [1] H. E. Rauch, F. Tung and C. T. Striebel, "Maximum likelihood estimates of linear dynamic
       systems", AIAA Journal 3:1445–1450, 1965. doi:10.2514/3.3166
.. [2] A. E. Bryson and M. Frazier, "Smoothing for linear and nonlinear dynamic systems",
       Technical report ASD-TDR-63-119, Wright-Patterson AFB, 1963, pp. 353–364.
.. [3] G. J. Bierman, *Factorization Methods for Discrete Sequential Estimation*, Academic
       Press, 1977 (sequential scalar updates, ch. II; modified Bryson–Frazier smoother, ch. X).
.. [4] A. C. Harvey, *Forecasting, Structural Time Series Models and the Kalman Filter*,
       Cambridge University Press, 1989 (prediction-error decomposition).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from ._kernel_loops import backward_pass, forward_pass

__all__ = [
    "BackwardCarry",
    "Checkpoints",
    "ExactSmoothing",
    "FilterCarry",
    "KernelModel",
    "default_segment",
    "filter_chunk",
    "filter_loglik",
    "smooth_chunk",
    "smooth_exact",
    "smooth_model",
]


# --- Python interface --------------------------------------------------------------------------
@dataclass(frozen=True)
class KernelModel:
    r"""The state-space model in the form the compiled kernel takes (contiguous float arrays).

    Parameters
    ----------
    H : ndarray of shape (n_sensors, n_coef)
    noise_var : ndarray of shape (n_sensors,)
    prior_var : ndarray of shape (n_coef,)
        Initial (and, for the OU columns, stationary) variance :math:`v_j`.
    drift_var : ndarray of shape (n_coef,)
        :math:`v_j` for the OU columns, :math:`d_j` for the random-walk columns.
    random_walk : ndarray of bool, shape (n_coef,)
    time_scale : float
        :math:`T`, in the unit of the frame times.
    fault_prior : float, default=0.0
        :math:`\varepsilon`, prior probability that a reading is faulty; 0 (the default): the
        plain Gaussian update. With :math:`\varepsilon > 0` every reading after the first
        informed frame is weighted by its posterior probability of being good (see
        :mod:`.health`).
    fault_var : ndarray of shape (n_sensors,), optional
        :math:`b_i`, the extra predictive variance of a faulty reading (with ``fault_prior``).
    level : ndarray of int, optional
        Columns whose smoothed moments are returned as the mean level; default every
        random-walk column (an augmented model names only its mean-level columns).

    See Also
    --------
    invert.stages.assimilate.dynamics.CoefficientDynamics : the same fields.
    """

    H: np.ndarray
    noise_var: np.ndarray
    prior_var: np.ndarray
    drift_var: np.ndarray
    random_walk: np.ndarray
    time_scale: float
    fault_prior: float = 0.0
    fault_var: np.ndarray | None = None
    level: np.ndarray | None = None

    @classmethod
    def build(cls, H, noise_var, prior_var, drift_var, random_walk, time_scale):
        """Check the arrays once and store them contiguous (float64, bool)."""
        H = np.ascontiguousarray(H, dtype=float)
        if H.ndim != 2:
            raise ValueError(f"The 'H' parameter must be a 2-d array. Got shape {H.shape}.")
        ns, p = H.shape
        arrays = {}
        for name, val, size in (("noise_var", noise_var, ns), ("prior_var", prior_var, p),
                                ("drift_var", drift_var, p)):
            a = np.ascontiguousarray(val, dtype=float)
            if a.shape != (size,):
                raise ValueError(f"The '{name}' parameter must have shape ({size},). Got "
                                 f"{a.shape} instead.")
            if not (np.all(np.isfinite(a)) and np.all(a > 0)):
                raise ValueError(f"The '{name}' parameter must be finite and > 0.")
            arrays[name] = a
        rw = np.ascontiguousarray(random_walk, dtype=np.bool_)
        if rw.shape != (p,):
            raise ValueError(f"The 'random_walk' parameter must have shape ({p},). Got "
                             f"{rw.shape} instead.")
        if not (np.isfinite(time_scale) and time_scale > 0):
            raise ValueError(f"The 'time_scale' parameter must be a float > 0. Got "
                             f"{time_scale!r} instead.")
        if not np.all(np.isfinite(H)):
            raise ValueError("The 'H' parameter must be finite.")
        return cls(H, arrays["noise_var"], arrays["prior_var"], arrays["drift_var"], rw,
                   float(time_scale))

    @classmethod
    def from_dynamics(cls, model):
        """From a :class:`~invert.stages.assimilate.dynamics.CoefficientDynamics`."""
        return cls.build(model.H, model.noise_var, model.prior_var, model.drift_var,
                         model.random_walk, model.time_scale)

    @property
    def n_coef(self) -> int:
        """Number of coefficients."""
        return self.H.shape[1]

    @property
    def level_columns(self) -> np.ndarray:
        """Indices of the mean-level columns (default: the random-walk columns)."""
        if self.level is not None:
            return np.asarray(self.level, dtype=np.int64)
        return np.flatnonzero(self.random_walk)

    @property
    def width(self) -> int:
        """State width inside the kernel: ``n_coef`` rounded up to a multiple of 8.

        The extra coefficients have zero columns in ``H`` (never observed, never coupled to
        the others: every product with them is an exact zero), so they change no result; they
        let the compiled row loops run in whole SIMD vectors.
        """
        return -(-self.n_coef // 8) * 8

    def pad(self, A):
        """Append zero columns to ``A`` up to :attr:`width` (for ``H`` or a query design)."""
        A = np.asarray(A, dtype=float)
        out = np.zeros(A.shape[:-1] + (self.width,))
        out[..., : self.n_coef] = A
        return out

    @cached_property
    def padded(self):
        """(H, noise_var, prior_var, drift_var, random_walk) at :attr:`width`."""
        extra = self.width - self.n_coef
        return (self.pad(self.H), self.noise_var, np.r_[self.prior_var, np.ones(extra)],
                np.r_[self.drift_var, np.ones(extra)],
                np.r_[self.random_walk, np.zeros(extra, np.bool_)])

    def _args(self):
        H, r, _, drift, rw = self.padded
        rbad = (np.zeros(r.size) if self.fault_var is None
                else np.ascontiguousarray(self.fault_var, dtype=float))
        return (H, r, drift, rw, self.time_scale, float(self.fault_prior), rbad)


@dataclass(frozen=True)
class FilterCarry:
    """Filtered state after a chunk, to start the next chunk from (small).

    ``t`` is the time of the last frame filtered (NaN before the first frame of the log);
    ``m`` and ``P`` have the kernel's padded width (:attr:`KernelModel.width`), as do the
    arrays of :class:`Checkpoints` and :class:`BackwardCarry`.
    """

    m: np.ndarray
    P: np.ndarray
    t: float
    loglik: float = 0.0
    informed: bool = False

    @classmethod
    def initial(cls, model):
        """Before the first frame: mean 0, covariance ``diag(prior_var)``, no time yet."""
        return cls(np.zeros(model.width), np.diag(model.padded[2]), np.nan, 0.0, False)


@dataclass(frozen=True)
class Checkpoints:
    """Filtered states before every ``every``-th frame of a chunk (kept for the backward pass).

    Attributes
    ----------
    m : ndarray of shape (n_checkpoints, n_coef)
    P : ndarray of shape (n_checkpoints, n_coef, n_coef)
    t : ndarray of shape (n_checkpoints,)
        Time of the frame before each checkpointed frame (NaN at the start of the log).
    informed : ndarray of bool, shape (n_checkpoints,)
        Whether any reading came before the checkpoint (until then the covariance is diagonal).
    every : int
    """

    m: np.ndarray
    P: np.ndarray
    t: np.ndarray
    informed: np.ndarray
    every: int


@dataclass(frozen=True)
class BackwardCarry:
    r"""Smoother adjoint :math:`(\tilde\lambda, \tilde\Lambda)` at the frame before a chunk.

    Zero after the last frame of the log (:meth:`final`).
    """

    lam: np.ndarray
    Lam: np.ndarray

    @classmethod
    def final(cls, model):
        """After the last frame of the log."""
        p = model.width
        return cls(np.zeros(p), np.zeros((p, p)))


@dataclass(frozen=True)
class ExactSmoothing:
    r"""Smoothed moments of every frame (exact), and the filter's likelihood figures.

    Attributes
    ----------
    mean : ndarray of shape (n_frames, n_coef)
        Smoothed coefficient means.
    query_mean, query_sd : ndarray of shape (n_frames, n_query)
        Smoothed mean and sd of ``Hq c`` (``n_query = 0`` without ``Hq``).
    level_mean, level_sd : ndarray of shape (n_frames, n_level)
        Smoothed mean and sd of the mean-level (random-walk) coefficients.
    chi2 : ndarray of shape (n_frames,)
        :math:`v_k^\top S_k^{-1} v_k`, the squared standardised innovations of each frame
        (chi-square with ``n_used`` degrees of freedom under the model; 0 without readings).
    n_used : ndarray of int, shape (n_frames,)
    frame_loglik : ndarray of shape (n_frames,)
        :math:`\log N(v_k \mid 0, S_k)` (0 without readings).
    loglik : float
        Sum of ``frame_loglik`` (prediction-error decomposition).
    """

    mean: np.ndarray
    query_mean: np.ndarray
    query_sd: np.ndarray
    level_mean: np.ndarray
    level_sd: np.ndarray
    chi2: np.ndarray
    n_used: np.ndarray
    frame_loglik: np.ndarray
    loglik: float


def _as_kernel_model(model):
    return model if isinstance(model, KernelModel) else KernelModel.from_dynamics(model)


def _check_log(model, t, Y, t_prev):
    t = np.ascontiguousarray(t, dtype=float)
    Y = np.ascontiguousarray(Y, dtype=float)
    ns = model.H.shape[0]
    if t.ndim != 1 or Y.shape != (t.size, ns):
        raise ValueError(f"The 'Y' parameter must have shape (n_frames, n_sensors) = "
                         f"({t.size}, {ns}). Got {Y.shape} instead.")
    if not np.all(np.isfinite(t)):
        raise ValueError("The 't' parameter must be finite.")
    steps = np.diff(t, prepend=t_prev) if np.isfinite(t_prev) else np.diff(t)
    if np.any(steps <= 0):
        raise ValueError("The 't' parameter must be strictly increasing (after the previous "
                         "chunk's last time).")
    if np.any(np.isinf(Y)):
        raise ValueError("The 'Y' parameter must be finite or NaN (missing).")
    return t, Y


def default_segment(n_frames) -> int:
    """Checkpoint spacing of about sqrt(n_frames), between 64 and 4096 frames."""
    return int(min(4096, max(64, math.ceil(math.sqrt(max(n_frames, 1))))))


def filter_chunk(model, carry, t, Y, *, every=None, faults=False):
    """Filter one chunk of frames from ``carry``; checkpoints for :func:`smooth_chunk`.

    Parameters
    ----------
    model : KernelModel or CoefficientDynamics
    carry : FilterCarry
        After the previous chunk (``FilterCarry.initial(model)`` at the start of the log).
    t : ndarray of shape (n_frames,)
        Strictly increasing times (after ``carry.t``).
    Y : ndarray of shape (n_frames, n_sensors)
        Readings, NaN where missing.
    every : int, optional
        Checkpoint spacing; default :func:`default_segment` of the chunk length.
    faults : bool, default=False
        Also return each reading's fault probability (a model with ``fault_prior > 0``).

    Returns
    -------
    carry : FilterCarry
        After the chunk (a new object; the input is not changed).
    checkpoints : Checkpoints
    chi2, frame_loglik : ndarray of shape (n_frames,)
    n_used : ndarray of int, shape (n_frames,)
    fault : ndarray of shape (n_frames, n_sensors)
        Only with ``faults=True``: the posterior probability that each reading is faulty
        (0 where missing, or when the model has no fault prior).
    """
    model = _as_kernel_model(model)
    t, Y = _check_log(model, t, Y, carry.t)
    n, p = t.size, model.width
    every = int(every or default_segment(n))
    n_cp = (n + every - 1) // every
    cp = Checkpoints(np.empty((n_cp, p)), np.empty((n_cp, p, p)), np.empty(n_cp),
                     np.zeros(n_cp, np.bool_), every)
    chi2, ll, n_used = np.zeros(n), np.zeros(n), np.zeros(n, np.int64)
    m, P = carry.m.astype(float).copy(), np.array(carry.P, dtype=float, order="C")
    total, informed = 0.0, bool(carry.informed)
    fault = np.zeros((n if model.fault_prior > 0 else 0, model.H.shape[0]))
    if n:
        total, informed = forward_pass(*model._args(), t, Y, m, P, float(carry.t), informed,
                                       every, cp.m, cp.P, cp.t, cp.informed, chi2, n_used, ll,
                                       fault)
    t_last = float(t[-1]) if n else carry.t
    out = (FilterCarry(m, P, t_last, carry.loglik + total, bool(informed)), cp, chi2, ll,
           n_used)
    if faults:
        return (*out, fault if fault.shape[0] == n else np.zeros((n, model.H.shape[0])))
    return out


def smooth_chunk(model, checkpoints, back, t, Y, Hq=None):
    """Smooth one chunk backwards, given its checkpoints and the adjoint from the later chunk.

    Parameters
    ----------
    model : KernelModel or CoefficientDynamics
    checkpoints : Checkpoints
        From :func:`filter_chunk` on the same ``t``, ``Y``.
    back : BackwardCarry
        From the later chunk (``BackwardCarry.final(model)`` for the last chunk of the log).
    t, Y : as in :func:`filter_chunk`.
    Hq : ndarray of shape (n_query, n_coef), optional
        Query design (rows: linear functionals of the coefficients, e.g. field values).

    Returns
    -------
    back : BackwardCarry
        For the chunk before this one.
    mean : ndarray of shape (n_frames, n_coef)
    query_mean, query_sd : ndarray of shape (n_frames, n_query)
    level_mean, level_sd : ndarray of shape (n_frames, n_level)
    """
    model = _as_kernel_model(model)
    t = np.ascontiguousarray(t, dtype=float)
    Y = np.ascontiguousarray(Y, dtype=float)
    p = model.n_coef
    Hq = np.zeros((0, p)) if Hq is None else np.atleast_2d(np.asarray(Hq, float))
    if Hq.ndim != 2 or Hq.shape[1] != p:
        raise ValueError(f"The 'Hq' parameter must have {p} columns. Got shape {Hq.shape}.")
    Hq = model.pad(Hq)
    level = model.level_columns
    n = t.size
    out = (np.empty((n, model.width)), np.empty((n, Hq.shape[0])), np.empty((n, Hq.shape[0])),
           np.empty((n, level.size)), np.empty((n, level.size)))
    lam, Lam = back.lam.astype(float).copy(), np.array(back.Lam, dtype=float, order="C")
    if n:
        backward_pass(*model._args(), t, Y, checkpoints.m, checkpoints.P, checkpoints.t,
                  checkpoints.informed, checkpoints.every, lam, Lam, Hq, level, *out)
    return (BackwardCarry(lam, Lam), out[0][:, :p], *out[1:])


def smooth_exact(H, noise_var, prior_var, drift_var, random_walk, time_scale, t, Y, Hq=None,
                 *, segment=None) -> ExactSmoothing:
    r"""Exact Kalman filter and smoother over a whole log held in memory.

    Parameters
    ----------
    H, noise_var, prior_var, drift_var, random_walk, time_scale
        The model, as in :class:`KernelModel`.
    t : ndarray of shape (n_frames,)
        Strictly increasing frame times.
    Y : ndarray of shape (n_frames, n_sensors)
        Readings, NaN where missing.
    Hq : ndarray of shape (n_query, n_coef), optional
        Query design: the smoothed mean and sd of ``Hq c`` are returned for every frame.
    segment : int, optional
        Checkpoint spacing (frames recomputed per backward segment); default about
        :math:`\sqrt{n}`.

    Returns
    -------
    ExactSmoothing

    Examples
    --------
    >>> import numpy as np
    >>> H = np.array([[1.0, 1.0], [1.0, -1.0]])
    >>> out = smooth_exact(H, [0.1, 0.1], [1.0, 1.0], [1.0, 1.0], [True, False], 10.0,
    ...                    np.arange(3.0), np.ones((3, 2)))
    >>> out.mean.shape, out.level_sd.shape
    ((3, 2), (3, 1))
    """
    model = KernelModel.build(H, noise_var, prior_var, drift_var, random_walk, time_scale)
    return smooth_model(model, t, Y, Hq, segment=segment)


def smooth_model(model, t, Y, Hq=None, *, segment=None) -> ExactSmoothing:
    """:func:`smooth_exact` for a :class:`KernelModel` (or a ``CoefficientDynamics``)."""
    model = _as_kernel_model(model)
    carry, cp, chi2, ll, n_used = filter_chunk(model, FilterCarry.initial(model), t, Y,
                                               every=segment)
    _, mean, qm, qs, lm, ls = smooth_chunk(model, cp, BackwardCarry.final(model), t, Y, Hq)
    return ExactSmoothing(mean, qm, qs, lm, ls, chi2, n_used, ll, carry.loglik)


def filter_loglik(model, t, Y) -> float:
    """Log-likelihood of the readings (prediction-error decomposition), filter only.

    ``model`` is a :class:`KernelModel` or a ``CoefficientDynamics``; memory does not grow with
    the log beyond the per-frame figures.
    """
    model = _as_kernel_model(model)
    n = len(t)
    return filter_chunk(model, FilterCarry.initial(model), t, Y, every=max(n, 1))[0].loglik
