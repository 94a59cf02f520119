"""The sequential chain of an assimilation run: forward over the chunks, then backward.

One driver serves every recursion (the compiled exact kernel, the NumPy steady-state
shortcut): a recursion gives a :class:`ChainSteps` (its two engine tasks, its first and last
carries and the dataclasses its spilled states hold). The forward pass runs chunk after chunk,
passing the small filter carry along and spilling each chunk's part (what the backward pass
needs) to the working folder as ``.npz`` data; the backward pass runs from the last chunk to
the first, passing the smoother carry back and writing each chunk's part files. Both carries
are checkpointed with the manifest, so an interrupted run resumes at the chunk where it
stopped; spilled parts are removed as soon as they are used.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..problem import interval_z
from .checkpoint import ChunkDone
from .statuses import count_statuses

__all__ = ["ChainSteps", "run_chain", "query_design"]


@dataclass(frozen=True)
class ChainSteps:
    """The two tasks of a recursion and what it passes along.

    Attributes
    ----------
    forward : callable
        ``forward(carry, chunk, last_time) -> (carry, part, info, last_time)``, an engine
        task (picklable: a module-level function or a ``functools.partial`` of one).
    backward : callable
        ``backward(part, back, info, Hq, labels, z, kind) -> (back, frames, query)``.
    initial, final : object
        The filter carry before the first chunk, the smoother carry after the last.
    loglik : callable
        ``loglik(carry)`` of the filter carry after the last chunk.
    classes : tuple of type
        The dataclasses that the carries and parts hold (read back as data only).
    prefix : str
        File-name prefix of the spilled parts and carries.
    """

    forward: Callable
    backward: Callable
    initial: Any
    final: Any
    loglik: Callable
    classes: tuple
    prefix: str


def query_design(job, p):
    """Return the design the backward tasks evaluate.

    Its first row picks coefficient 0 (the mean level); the others are the query points.
    """
    return np.vstack([np.eye(1, p), job.domain.design(job.query_points).reshape(-1, p)])


def run_chain(job, source, engine, work, steps, p):
    """Run the chain of ``steps`` over ``source``: yield after each committed chunk.

    Returns the log-likelihood (``steps.loglik`` of the last filter carry).
    """
    yield from _forward(source, engine, work, steps)
    yield from _backward(job, source, engine, work, steps, p)
    return work.manifest.get("loglik")


def _name(steps, what, i):
    return f"{steps.prefix}{what}-{i:06d}.npz"


def _forward(source, engine, work, steps):
    done = work.manifest["done"]
    if done.get("forward_complete"):
        return
    n_fwd = done.get("forward", 0)
    carry = (work.load(_name(steps, "fcarry", n_fwd - 1), steps.classes) if n_fwd
             else steps.initial)
    last = work.manifest.get("last_time")
    last = -np.inf if last is None else last
    for i, chunk in enumerate(source):
        if i < n_fwd:
            continue
        carry, part, info, last = engine.submit(steps.forward, carry, chunk, last).result()
        work.dump((part, info), _name(steps, "part", i), steps.classes)
        work.dump(carry, _name(steps, "fcarry", i), steps.classes)
        done["forward"] = i + 1
        work.manifest["last_time"] = last
        work.save()
        work.remove(_name(steps, "fcarry", i - 1))
        yield ChunkDone("forward", i, len(chunk))
    done["forward_complete"] = True
    work.manifest["n_chunks"] = done.get("forward", 0)
    work.manifest["loglik"] = float(steps.loglik(carry))
    work.save()


def _backward(job, source, engine, work, steps, p):
    done = work.manifest["done"]
    n_chunks = work.manifest["n_chunks"]
    kind = source.time_kind or work.manifest.get("time_kind") or "number"
    work.manifest["time_kind"] = kind
    Hq = query_design(job, p)
    z = interval_z(job.level)
    n_back = done.get("backward", 0)
    back = (work.load(_name(steps, "bcarry", n_chunks - n_back), steps.classes) if n_back
            else steps.final)
    for i in range(n_chunks - 1 - n_back, -1, -1):
        part, info = work.load(_name(steps, "part", i), steps.classes)
        back, ftab, qtab = engine.submit(steps.backward, part, back, info, Hq,
                                         job.query_labels, z, kind).result()
        work.write_parts(i, job.table_fmt, ftab, qtab)
        work.dump(back, _name(steps, "bcarry", i), steps.classes)
        count_statuses(work.manifest, info["status"], info["reason"])
        done["backward"] = n_chunks - i
        work.save()
        work.remove(_name(steps, "bcarry", i + 1), _name(steps, "part", i))
        yield ChunkDone("backward", i, len(info["t"]))
