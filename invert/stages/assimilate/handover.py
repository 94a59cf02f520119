r"""Warm-up starts for chunks of the exact kernel, and the checks that accept them.

A chunk of an exact assimilation run needs the filtered state after the chunk before it (the
forward pass) and the smoother adjoint from the chunk after it (the backward pass). Both can be
guessed before that neighbour is done, from a short *warm-up*: the filter run from the prior
over the last ``B`` frames before the chunk (:func:`warm_filter`), or the adjoint recursion run
from zero over the first ``B`` frames after it (:func:`warm_adjoint`). When the true state
arrives it is compared with the guess at the same frame (:func:`filter_mismatch`,
:func:`adjoint_mismatch`); the chunk's result is kept when both mismatches are below a
tolerance, else the chunk is run again from the true state.

Notes
-----
Why a small mismatch at the hand-over stays small. Two filters with the same readings and the
same model, started from different means, keep the same covariances (they do not depend on the
data). With :math:`\delta m^-_k = F\delta m_{k-1}` and the information form of the update,
:math:`P_k^{-1}\delta m_k = (P^-_k)^{-1}\delta m^-_k` (the readings cancel), so

.. math::
   \delta m_k^\top P_k^{-1} \delta m_k
   = \delta m^{-\top}_k (P^-_k)^{-1} P_k (P^-_k)^{-1} \delta m^-_k
   \le \delta m^{-\top}_k (P^-_k)^{-1} \delta m^-_k
   = \delta m_{k-1}^\top F^\top (P^-_k)^{-1} F \delta m_{k-1}
   \le \delta m_{k-1}^\top P_{k-1}^{-1} \delta m_{k-1},

the first inequality from :math:`P_k \le P^-_k` (an update only removes variance), the second
from :math:`P^-_k = F P_{k-1} F^\top + Q \ge F P_{k-1} F^\top` when :math:`Q \ge 0`, i.e.
:math:`F^\top (P^-_k)^{-1} F \le P_{k-1}^{-1}`. So the mean mismatch in the filter's own
metric (Mahalanobis) never grows, and since
:math:`|\delta m_a| \le \sqrt{P_{aa}}\,(\delta m^\top P^{-1}\delta m)^{1/2}`, no coordinate and
no linear functional is ever off by more than that many of its own sds. Riccati solutions from
different initial covariances converge to each other (a contraction in Riemann's metric on
positive-definite matrices: Bougerol 1993; Anderson & Moore 1979, ch. 4), so the covariance
mismatch shrinks as well.

The tolerance. With the default of 1e-10 in sd units at each hand-over and this non-increase,
a frame is never off by more than the sum of the mismatches accepted before it (reported as
``bound``): 1e-8 after a hundred hand-overs in the worst case, and in practice far less since
each mismatch keeps shrinking over the chunk that follows. A covariance mismatch of 1e-10
(relative) changes gains by as much, so means by 1e-10 of an innovation (a few sds at most).

References
----------
.. [1] P. Bougerol, "Kalman filtering with random coefficients and contractions", SIAM J.
       Control Optim. 31:942–959, 1993. doi:10.1137/0331041
.. [2] B. D. O. Anderson and J. B. Moore, *Optimal Filtering*, Prentice-Hall, 1979, ch. 4.
.. [3] G. J. Bierman, *Factorization Methods for Discrete Sequential Estimation*, Academic
       Press, 1977 (modified Bryson–Frazier smoother, ch. X).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .kernel import BackwardCarry, Checkpoints, FilterCarry, filter_chunk, smooth_chunk

__all__ = ["Mismatch", "adjoint_mismatch", "filter_mismatch", "warm_adjoint", "warm_filter",
           "warmup_frames"]


@dataclass(frozen=True)
class Mismatch:
    r"""Mismatch of a warm-up guess against the true state at a hand-over.

    Attributes
    ----------
    mean : float
        Mahalanobis distance of the two means in the (true) state's metric: no coordinate and
        no linear functional differs by more sds than this.
    cov : float
        :math:`\max_{ab} |\delta P_{ab}| / \sqrt{P_{aa} P_{bb}}`.
    """

    mean: float
    cov: float

    def within(self, tol) -> bool:
        """Whether both mismatches are at most ``tol`` (NaN is never within)."""
        return bool(self.mean <= tol and self.cov <= tol)

    @property
    def largest(self) -> float:
        """The larger of the two."""
        return float(max(self.mean, self.cov))


def _mahalanobis(d, C):
    """Return ``sqrt(d' C^-1 d)``, via the Cholesky factor of the correlation matrix of C."""
    sd = np.sqrt(np.diag(C))
    if not np.all(sd > 0):
        return math.inf
    try:
        L = np.linalg.cholesky(C / np.outer(sd, sd))
    except np.linalg.LinAlgError:
        return math.inf
    return float(np.linalg.norm(np.linalg.solve(L, d / sd)))


def _relative(dC, C):
    sd = np.sqrt(np.diag(C))
    return float(np.max(np.abs(dC) / np.outer(sd, sd))) if np.all(sd > 0) else math.inf


def filter_mismatch(true, warm) -> Mismatch:
    """Compare a warmed-up :class:`FilterCarry` with the true one at the same frame.

    Parameters
    ----------
    true, warm : FilterCarry

    Returns
    -------
    Mismatch
        Infinite when the two are not at the same frame or only one has seen a reading.
    """
    same_frame = (true.t == warm.t) or (np.isnan(true.t) and np.isnan(warm.t))
    if not same_frame or bool(true.informed) != bool(warm.informed):
        return Mismatch(math.inf, math.inf)
    return Mismatch(_mahalanobis(warm.m - true.m, true.P), _relative(warm.P - true.P, true.P))


def adjoint_mismatch(true, warm, P) -> Mismatch:
    r"""Compare a warmed-up :class:`BackwardCarry` with the true one.

    The smoothed moments at the hand-over frame are :math:`m - P\tilde\lambda` and
    :math:`P - P\tilde\Lambda P` (:mod:`.kernel`), so the mismatch is measured on them: the
    mean's in the true smoothed metric, the covariance's relative to the smoothed sds.

    Parameters
    ----------
    true, warm : BackwardCarry
    P : ndarray of shape (width, width)
        Filtered covariance at the hand-over frame (the first checkpoint of the later chunk).

    Returns
    -------
    Mismatch
    """
    Ps = P - P @ true.Lam @ P
    Ps = 0.5 * (Ps + Ps.T)
    return Mismatch(_mahalanobis(P @ (warm.lam - true.lam), Ps),
                    _relative(P @ (warm.Lam - true.Lam) @ P, Ps))


def warm_filter(model, t, Y):
    """Filter ``t``, ``Y`` (the frames just before a chunk) from the prior.

    Returns the :class:`FilterCarry` after the last of them, with log-likelihood 0 (the
    guess of the carry a chunk would get from the one before it).
    """
    carry = filter_chunk(model, FilterCarry.initial(model), t, Y, every=max(len(t), 1))[0]
    return FilterCarry(carry.m, carry.P, carry.t, 0.0, carry.informed)


def warm_adjoint(model, checkpoints, t, Y, n):
    """Run the adjoint from zero back over the first ``n`` frames of a filtered chunk.

    Parameters
    ----------
    model : KernelModel
    checkpoints : Checkpoints
        Of the later chunk (its first ones cover the ``n`` frames).
    t, Y : ndarray
        That chunk's accepted frames (only the first ``n`` are used).
    n : int

    Returns
    -------
    BackwardCarry
        The guess of the adjoint at the frame before that chunk.
    """
    k = -(-n // checkpoints.every)
    head = Checkpoints(checkpoints.m[:k], checkpoints.P[:k], checkpoints.t[:k],
                       checkpoints.informed[:k], checkpoints.every)
    return smooth_chunk(model, head, BackwardCarry.final(model), t[:n], Y[:n])[0]


def warmup_frames(time_scale, step, tol, *, factor=1.0):
    r"""Warm-up length in frames: ``factor`` time scales per e-fold of ``1/tol``.

    The slowest mismatch decays on the time scale of the dynamics (the directions the readings
    do not see relax like :math:`e^{-\Delta/T}` and are coupled to the mean level, a random
    walk). Measured on the demo disk with 26 sensors (``bench/bench_kernel.make_log``, T =
    3600 s): the mean mismatch falls by e every 0.55 T (prior tau^2 = 1) to 1.0 T (the batch's
    estimates on that log, tau^2 = 0.13), hence :math:`B = T \ln(1/\mathrm{tol})` frames.

    Parameters
    ----------
    time_scale, step : float
        Time scale of the dynamics and the median time step (same unit).
    tol : float
    factor : float, default=1.0

    Returns
    -------
    int
    """
    frames = factor * (time_scale / step) * math.log(1.0 / tol)
    return int(max(16, math.ceil(frames)))
