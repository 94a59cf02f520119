r"""Exact assimilation with several chunks in flight: warm-up starts and checked hand-overs.

The sequential chain (:mod:`invert.batch.chain`) cannot start chunk ``i`` before chunk
``i - 1`` is done, so a cluster runs one task at a time. Here a chunk's task may start from a
*warm-up* instead (:mod:`invert.stages.assimilate.handover`):

* forward, the filter run from the prior over the last ``B`` accepted frames before the chunk
  (the main process keeps them and sends them with the chunk);
* backward, the adjoint run from zero over the first ``B`` frames of the chunk after it
  (recomputed from that chunk's first checkpoint, in its spilled part).

Up to the engine's ``in_flight`` tasks run at once. Chunks are committed in order: when the
true state of the neighbour is known, the task's warm-up is compared with it at the same frame
(mean in sd units, covariance relative); below the tolerance the chunk's result is kept, else
the chunk is run again from the true state (always exact; counted). A chunk whose neighbour is
already committed when it is submitted starts from the true state directly. ``B`` is
:func:`~invert.stages.assimilate.handover.warmup_frames` of the time scale (or the job's
``warmup``), extrapolated from the mismatch after a failed check; a chunk is not started
early when ``B`` exceeds half its frames (the warm-up would cost more than it saves).

What is done is recorded in the manifest exactly as for the sequential chain (the same files,
the same counters), so ``--resume`` continues either way; the manifest's ``handover`` entry
holds the warm-up length, the tolerance, the largest mismatch accepted, the sum of the accepted
mismatches (a bound on any frame's error in sd units, see the module above) and what happened
to each chunk (``start``: from the true state, ``accepted``, ``rerun``).
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from ..problem import interval_z
from ..stages.assimilate.handover import (
    adjoint_mismatch,
    filter_mismatch,
    warm_adjoint,
    warm_filter,
    warmup_frames,
)
from ..stages.assimilate.kernel import BackwardCarry, FilterCarry, KernelModel
from .chain import query_design
from .checkpoint import ChunkDone
from .kernel_chain import KERNEL_CLASSES, accepted_frames, backward_task, chunk_info, filter_part
from .statuses import count_statuses

__all__ = ["HANDOVER_TOL", "overlapped_chunks"]

#: Default hand-over tolerance (sd units, and relative for covariances).
HANDOVER_TOL = 1e-10

#: A chunk starts early only when its warm-up is at most this fraction of its frames.
MAX_WARMUP_FRACTION = 0.5


# --- engine tasks ------------------------------------------------------------------------------
def forward_from(kmodel, carry, t, Y):
    """Filter a chunk from the true carry (an engine task): ``(None, carry, part)``."""
    return (None, *filter_part(kmodel, carry, t, Y))


def forward_warm(kmodel, tail_t, tail_Y, t, Y):
    """Warm up on the frames before a chunk, then filter it: ``(warm, carry, part)``.

    The returned carry's log-likelihood is the chunk's own (the warm-up starts at 0).
    """
    warm = warm_filter(kmodel, tail_t, tail_Y)
    return (warm, *filter_part(kmodel, warm, t, Y))


def backward_from(kmodel, part, back, info, Hq, labels, z, kind):
    """Smooth a chunk from the true adjoint (an engine task): ``(None, back, frames, query)``."""
    return (None, *backward_task(kmodel, part, back, info, Hq, labels, z, kind))


def backward_warm(kmodel, cp_next, t_next, Y_next, part, info, Hq, labels, z, kind):
    """Warm the adjoint up on the next chunk's first frames, then smooth this chunk."""
    warm = warm_adjoint(kmodel, cp_next, t_next, Y_next, len(t_next))
    return (warm, *backward_task(kmodel, part, warm, info, Hq, labels, z, kind))


# --- bookkeeping --------------------------------------------------------------------------------
@dataclass
class _Pending:
    """A chunk submitted (or waiting to be) whose result is not committed yet."""

    index: int
    info: dict
    data: Any          # forward: (t, Y, last_time); backward: part
    future: Any = None
    used: int = 0      # warm-up frames (0: started from the true state)
    boundary: Any = None  # backward: filtered covariance at the hand-over frame


class _Handovers:
    """The manifest's ``handover`` entry: warm-up length, tolerance and what each chunk did."""

    def __init__(self, manifest, tol, warmup):
        self.rec = manifest.setdefault("handover", {
            "tolerance": float(tol), "warmup_frames": warmup, "warmup_how": None,
            "forward": {"accepted": 0, "rerun": 0, "largest": 0.0, "bound": 0.0},
            "backward": {"accepted": 0, "rerun": 0, "largest": 0.0, "bound": 0.0},
            "chunks": {"forward": [], "backward": []}})
        self.tol = self.rec["tolerance"]

    @property
    def warmup(self):
        return self.rec["warmup_frames"]

    def choose(self, time_scale, t):
        """Fix the warm-up length once (from the time scale and the median step of ``t``)."""
        if self.rec["warmup_frames"] is not None or len(t) < 2:
            return
        step = float(np.median(np.diff(t)))
        self.rec["warmup_frames"] = warmup_frames(time_scale, step, self.tol)
        self.rec["warmup_how"] = (f"one time scale per e-fold of 1/tolerance (time scale "
                                  f"{time_scale:.4g}, median step {step:.4g}); after a failed "
                                  f"check, extrapolated from the mismatch seen")

    def early(self, n_frames, available):
        """Whether a chunk of ``n_frames`` may start from a warm-up of ``available`` frames."""
        B = self.warmup
        return B is not None and available >= B and B <= MAX_WARMUP_FRACTION * n_frames

    def outcome(self, phase, i, mismatch, used=None):
        """Record chunk ``i``'s hand-over (warm-up of ``used`` frames); return whether kept."""
        entry = self.rec[phase]
        if mismatch is None:
            self.rec["chunks"][phase].append([i, "start", None])
            return True
        ok = mismatch.within(self.tol)
        self.rec["chunks"][phase].append([i, "accepted" if ok else "rerun",
                                          float(mismatch.largest)])
        if ok:
            entry["accepted"] += 1
            entry["largest"] = max(entry["largest"], mismatch.largest)
            entry["bound"] += mismatch.largest
        else:
            entry["rerun"] += 1
            self.rec["warmup_frames"] = max(self.warmup, longer_warmup(used, mismatch.largest,
                                                                       self.tol))
        return ok

    def summary(self):
        """Return the summary.json entry."""
        return dict(self.rec)


def longer_warmup(used, mismatch, tol, *, start=10.0, margin=1.3):
    """Warm-up length after a failed check of a warm-up of ``used`` frames.

    The mismatch is taken to fall geometrically from about ``start`` sds (a prior start) to
    ``mismatch`` over the ``used`` frames; the new length reaches ``tol`` at that rate, times
    ``margin``, and is at least 1.25 times ``used`` (twice when the mismatch says nothing).
    """
    if not (np.isfinite(mismatch) and tol < mismatch < start):
        return 2 * used
    rate = np.log(start / mismatch) / used
    return int(max(np.ceil(1.25 * used), np.ceil(margin * np.log(start / tol) / rate)))


def _name(what, i):
    return f"k{what}-{i:06d}.npz"  # the sequential chain's names: either driver resumes


# --- forward ------------------------------------------------------------------------------------
def _forward(source, engine, work, kmodel, ho, time_scale):
    done = work.manifest["done"]
    if done.get("forward_complete"):
        return
    n_fwd = done.get("forward", 0)
    state = {"carry": (work.load(_name("fcarry", n_fwd - 1), KERNEL_CLASSES) if n_fwd
                       else FilterCarry.initial(kmodel))}
    last = work.manifest.get("last_time")
    last = -np.inf if last is None else last
    ns = kmodel.H.shape[0]
    tail_t, tail_Y = np.empty(0), np.empty((0, ns))
    pending = deque()
    for i, chunk in enumerate(source):
        if i < n_fwd:
            continue
        info, last = chunk_info(chunk, last)
        t, Y = accepted_frames(chunk, info)
        ho.choose(time_scale, t)
        item = _Pending(i, info, (t, Y, last))
        if not pending:
            item.future = engine.submit(forward_from, kmodel, state["carry"], t, Y)
        elif ho.early(len(t), len(tail_t)):
            B = ho.warmup
            item.future = engine.submit(forward_warm, kmodel, tail_t[-B:].copy(),
                                        tail_Y[-B:].copy(), t, Y)
            item.used = B
        pending.append(item)
        keep = max(ho.warmup or 0, 1)
        tail_t, tail_Y = np.r_[tail_t, t][-keep:], np.vstack([tail_Y, Y])[-keep:]
        while len(pending) >= max(engine.in_flight, 1):
            yield from _commit_forward(pending, engine, work, kmodel, ho, state)
    while pending:
        yield from _commit_forward(pending, engine, work, kmodel, ho, state)
    done["forward_complete"] = True
    work.manifest["n_chunks"] = done.get("forward", 0)
    work.manifest["loglik"] = float(state["carry"].loglik)
    work.save()


def _commit_forward(pending, engine, work, kmodel, ho, state):
    item = pending.popleft()
    carry = state["carry"]
    t, Y, last = item.data
    if item.future is None:
        item.future = engine.submit(forward_from, kmodel, carry, t, Y)
    warm, new, part = item.future.result()
    if warm is not None:
        if ho.outcome("forward", item.index, filter_mismatch(carry, warm), item.used):
            new = replace(new, loglik=carry.loglik + new.loglik)
        else:
            _, new, part = engine.submit(forward_from, kmodel, carry, t, Y).result()
    else:
        ho.outcome("forward", item.index, None)
    i = item.index
    work.dump((part, item.info), _name("part", i), KERNEL_CLASSES)
    work.dump(new, _name("fcarry", i), KERNEL_CLASSES)
    work.manifest["done"]["forward"] = i + 1
    work.manifest["last_time"] = last
    work.save()
    work.remove(_name("fcarry", i - 1))
    state["carry"] = new
    if pending and pending[0].future is None:  # its neighbour is committed: start it now
        nt, nY, _ = pending[0].data
        pending[0].future = engine.submit(forward_from, kmodel, new, nt, nY)
    yield ChunkDone("forward", i, len(item.info["t"]))


# --- backward -----------------------------------------------------------------------------------
def _backward(job, source, engine, work, kmodel, ho):
    done = work.manifest["done"]
    n_chunks = work.manifest["n_chunks"]
    kind = source.time_kind or work.manifest.get("time_kind") or "number"
    work.manifest["time_kind"] = kind
    args = (query_design(job, kmodel.n_coef), job.query_labels, interval_z(job.level), kind)
    n_back = done.get("backward", 0)
    state = {"back": (work.load(_name("bcarry", n_chunks - n_back), KERNEL_CLASSES) if n_back
                      else BackwardCarry.final(kmodel)), "args": args, "fmt": job.table_fmt}
    pending, later = deque(), None
    for i in range(n_chunks - 1 - n_back, -1, -1):
        part, info = work.load(_name("part", i), KERNEL_CLASSES)
        item = _Pending(i, info, part)
        if not pending:
            item.future = engine.submit(backward_from, kmodel, part, state["back"], info, *args)
        elif later is not None and ho.early(len(part["t"]), len(later["t"])):
            B = ho.warmup
            k = -(-B // later["cp"].every)
            cp = replace(later["cp"], m=later["cp"].m[:k], P=later["cp"].P[:k],
                         t=later["cp"].t[:k], informed=later["cp"].informed[:k])
            item.future = engine.submit(backward_warm, kmodel, cp, later["t"][:B].copy(),
                                        later["Y"][:B].copy(), part, info, *args)
            item.used, item.boundary = B, later["cp"].P[0]
        pending.append(item)
        later = part
        while len(pending) >= max(engine.in_flight, 1):
            yield from _commit_backward(pending, engine, work, kmodel, ho, state, n_chunks)
    while pending:
        yield from _commit_backward(pending, engine, work, kmodel, ho, state, n_chunks)


def _commit_backward(pending, engine, work, kmodel, ho, state, n_chunks):
    item = pending.popleft()
    back, args, i = state["back"], state["args"], item.index
    if item.future is None:
        item.future = engine.submit(backward_from, kmodel, item.data, back, item.info, *args)
    warm, new, ftab, qtab = item.future.result()
    if warm is not None:
        if not ho.outcome("backward", i, adjoint_mismatch(back, warm, item.boundary),
                          item.used):
            _, new, ftab, qtab = engine.submit(backward_from, kmodel, item.data, back,
                                               item.info, *args).result()
    else:
        ho.outcome("backward", i, None)
    work.write_parts(i, state["fmt"], ftab, qtab)
    work.dump(new, _name("bcarry", i), KERNEL_CLASSES)
    count_statuses(work.manifest, item.info["status"], item.info["reason"])
    work.manifest["done"]["backward"] = n_chunks - i
    work.save()
    work.remove(_name("bcarry", i + 1), _name("part", i))
    state["back"] = new
    if pending and pending[0].future is None:
        nxt = pending[0]
        nxt.future = engine.submit(backward_from, kmodel, nxt.data, new, nxt.info, *args)
    yield ChunkDone("backward", i, len(item.info["t"]))


def overlapped_chunks(job, source, engine, work, model, *, tol=HANDOVER_TOL, warmup=None):
    """Run the exact assimilation with chunks overlapped on the engine.

    Parameters
    ----------
    job : BatchJob
    source : LogSource
    engine : Engine
        Several tasks in flight (``engine.in_flight``) pay off only with several workers.
    work : WorkFolder
    model : CoefficientDynamics
        With its time scale set.
    tol : float, default=1e-10
        Hand-over tolerance (:class:`~invert.stages.assimilate.handover.Mismatch`).
    warmup : int, optional
        Warm-up length in frames; default from the time scale
        (:func:`~invert.stages.assimilate.handover.warmup_frames`).

    Yields
    ------
    ChunkDone

    Returns
    -------
    (float, dict)
        The log-likelihood, and the summary entry of the hand-overs.
    """
    kmodel = KernelModel.from_dynamics(model)
    ho = _Handovers(work.manifest, tol, warmup)
    yield from _forward(source, engine, work, kmodel, ho, model.time_scale)
    yield from _backward(job, source, engine, work, kmodel, ho)
    return work.manifest.get("loglik"), ho.summary()
