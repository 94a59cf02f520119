r"""Exact assimilation of a batch run on the compiled kernel, chunk after chunk.

The forward pass filters each chunk with :func:`~invert.stages.assimilate.kernel.filter_chunk`
from the previous chunk's :class:`~invert.stages.assimilate.kernel.FilterCarry` and spills
the chunk's accepted frames with the filter checkpoints (every ``segment`` frames) to the
working folder; the backward pass runs :func:`~invert.stages.assimilate.kernel.smooth_chunk`
from the last chunk to the first, carrying the smoother adjoint
(:class:`~invert.stages.assimilate.kernel.BackwardCarry`), and writes each chunk's part files.
Both carries are small (:math:`O(p^2)`), checkpointed with the manifest, so an interrupted run
resumes at the chunk where it stopped. Spilled parts are ``.npz`` data files, removed as soon
as the backward pass has used them.

Every frame is exact: the same posterior as the dense joint Gaussian of the stacked model
(Rauch, Tung & Striebel 1965), whatever the drop-out pattern and the time steps.

References
----------
.. [1] H. E. Rauch, F. Tung and C. T. Striebel, "Maximum likelihood estimates of linear dynamic
       systems", AIAA Journal 3:1445–1450, 1965. doi:10.2514/3.3166
.. [2] G. J. Bierman, *Factorization Methods for Discrete Sequential Estimation*, Academic
       Press, 1977 (sequential scalar updates, ch. II; modified Bryson–Frazier smoother, ch. X).
"""

from __future__ import annotations

from functools import partial

import numpy as np

from ..io.sources import seconds
from ..stages.assimilate.kernel import (
    BackwardCarry,
    Checkpoints,
    FilterCarry,
    KernelModel,
    filter_chunk,
    smooth_chunk,
)
from .chain import ChainSteps, run_chain
from .statuses import frame_statuses
from .tables import empty_query, frames_table, query_table

__all__ = ["KERNEL_CLASSES", "RECURSION", "SEGMENT", "accepted_frames", "backward_task",
           "chunk_info", "chunk_tables_from", "filter_part", "kernel_chunks", "kernel_steps"]

#: The dataclasses spilled by this mode (the only ones read back, as data).
KERNEL_CLASSES = (FilterCarry, Checkpoints, BackwardCarry)

#: What summary.json says about the recursion of this mode.
RECURSION = ("exact: compiled Kalman filter with sequential scalar updates and modified "
             "Bryson-Frazier smoother (Bierman 1977), every frame")

#: Checkpoint spacing of the forward pass within a chunk (frames recomputed per backward
#: segment): memory of one segment is ``SEGMENT * p**2`` floats (about 19 MB at p = 48).
SEGMENT = 1024


def chunk_info(chunk, last_time):
    """Return the statuses of a chunk's frames: ``(info, last_time)``.

    ``info['acc']`` marks the frames the filter takes (a usable time, in order).
    """
    status, reason, acc, last = frame_statuses(chunk, last_time, min_readings=1)
    info = {"t": chunk.t, "frame": chunk.frame, "status": status, "reason": reason,
            "acc": acc, "n_used": np.isfinite(chunk.Y).sum(axis=1)}
    return info, last


def chunk_tables_from(info, c_mean, c_sd, nis, n_used, qm, qs, labels, z, kind):
    """Build the ``frames`` and ``query`` tables of a smoothed chunk.

    Parameters
    ----------
    info : dict
        From :func:`chunk_info`.
    c_mean, c_sd, nis : ndarray of shape (n_accepted,)
        Smoothed mean and sd of coefficient 0 (the mean level), and the squared standardised
        innovations of the accepted frames.
    n_used : ndarray of int, shape (n_accepted,)
        Readings used per accepted frame (``nis`` is reported as missing without any).
    qm, qs : ndarray of shape (n_accepted, n_query)
    labels, z, kind
        Query labels, interval half-width in sds, time kind of the log.
    """
    L = len(info["t"])
    acc = info["acc"]
    cmean, csd, chi2 = np.full(L, np.nan), np.full(L, np.nan), np.full(L, np.nan)
    if acc.any():
        cmean[acc], csd[acc] = c_mean, c_sd
        chi2[acc] = np.where(n_used > 0, nis, np.nan)
        qtab = query_table(info["t"][acc], labels, qm, qs, z, kind)
    else:
        qtab = empty_query(kind)
    ftab = frames_table(info["t"], info["frame"], info["status"], info["reason"],
                        info["n_used"], cmean, csd, chi2, kind)
    return ftab, qtab


def accepted_frames(chunk, info):
    """Return the times (seconds) and readings of the frames the filter takes, contiguous."""
    acc = info["acc"]
    return np.ascontiguousarray(seconds(chunk.t[acc])), np.ascontiguousarray(chunk.Y[acc])


def filter_part(kmodel, carry, t, Y):
    """Filter accepted frames ``t``, ``Y`` from ``carry``: ``(carry, part)``.

    ``part`` holds what the backward pass needs (frames, checkpoints every :data:`SEGMENT`
    frames, squared standardised innovations, readings used).
    """
    carry, cp, nis, _, n_used = filter_chunk(kmodel, carry, t, Y, every=SEGMENT)
    return carry, {"t": t, "Y": Y, "cp": cp, "nis": nis, "n_used": n_used}


def forward_task(kmodel, carry, chunk, last_time):
    """Filter one chunk (an engine task): ``(carry, part, info, last_time)``."""
    info, last = chunk_info(chunk, last_time)
    carry, part = filter_part(kmodel, carry, *accepted_frames(chunk, info))
    return carry, part, info, last


def backward_task(kmodel, part, back, info, Hq, labels, z, kind):
    """Smooth one chunk and build its tables (an engine task): ``(back, frames, query)``.

    ``Hq``'s first row picks coefficient 0 (the mean level of the frames table); the others
    are the query points.
    """
    back, _, qm, qs, _, _ = smooth_chunk(kmodel, part["cp"], back, part["t"], part["Y"], Hq)
    ftab, qtab = chunk_tables_from(info, qm[:, 0], qs[:, 0], part["nis"], part["n_used"],
                                   qm[:, 1:], qs[:, 1:], labels, z, kind)
    return back, ftab, qtab


def kernel_steps(model):
    """Return the chain steps of the exact kernel for ``model`` (``CoefficientDynamics``)."""
    kmodel = KernelModel.from_dynamics(model)
    return ChainSteps(partial(forward_task, kmodel), partial(backward_task, kmodel),
                      FilterCarry.initial(kmodel), BackwardCarry.final(kmodel),
                      lambda carry: carry.loglik, KERNEL_CLASSES, "k")


def kernel_chunks(job, source, engine, work, model):
    """Run the exact assimilation chunk after chunk (forward, then backward).

    Parameters
    ----------
    job : BatchJob
    source : LogSource
    engine : Engine
    work : WorkFolder
    model : CoefficientDynamics
        With its time scale set.

    Yields
    ------
    ChunkDone

    Returns
    -------
    float
        The log-likelihood of the log (prediction-error decomposition).
    """
    return (yield from run_chain(job, source, engine, work, kernel_steps(model), model.n_coef))
