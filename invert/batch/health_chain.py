r"""Assimilation with the sensor-health model: offsets and faulty readings, chunk after chunk.

The compiled exact kernel runs on the augmented model of
:func:`~invert.stages.assimilate.health.augment` (coefficients plus zero-sum offset
contrasts, faulty readings down-weighted inside the scalar update) through the same chain
driver as the plain kernel (:func:`~invert.batch.chain.run_chain`): the same two engine tasks
per chunk, so it runs on every engine and resumes like it. The forward task also keeps the
readings whose fault probability exceeds 0.5; the backward task evaluates every sensor's
smoothed offset as extra query rows ``[0, B_i]`` and sums it per block of time (a number of
log records, or a duration), so each chunk adds two small part files (``hsens``, ``hspk``)
beside its frames and query parts. :mod:`invert.batch.health_tables` merges and flags them.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import partial

import numpy as np

from ..io.sources import seconds
from ..stages.assimilate.health import HealthSettings, augment, offset_rows
from ..stages.assimilate.kernel import BackwardCarry, FilterCarry, filter_chunk, smooth_chunk
from .chain import ChainSteps, run_chain
from .kernel_chain import KERNEL_CLASSES, SEGMENT, chunk_info, chunk_tables_from

__all__ = ["HealthBlock", "parse_block", "health_chunks", "health_steps", "SPIKE_PROBABILITY",
           "HealthWork"]

#: A reading is listed in spikes.<fmt> when its fault probability exceeds this.
SPIKE_PROBABILITY = 0.5

_UNITS = {"s": 1.0, "sec": 1.0, "min": 60.0, "h": 3600.0, "d": 86400.0}


@dataclass(frozen=True)
class HealthBlock:
    """Blocks of time the offsets are summarised over.

    ``frames``: blocks of that many log records (record number // frames); ``seconds``:
    blocks of that duration in the unit of the log's times (seconds for date-times), counted
    from time 0 (the Unix epoch for date-times), so blocks do not depend on the chunks.
    """

    frames: int | None = None
    seconds: float | None = None

    def ids(self, frame, t):
        """Return the block number of each frame (record numbers ``frame``, times ``t``)."""
        if self.frames is not None:
            return np.asarray(frame, np.int64) // self.frames
        return np.floor(seconds(t) / self.seconds).astype(np.int64)

    def describe(self):
        """Return the block size as a phrase."""
        if self.frames is not None:
            return f"{self.frames} log records"
        return f"{self.seconds:g} time units (seconds for date-times)"


def parse_block(text):
    """Read ``--health-block``: a frame count (``1000``) or a duration (``30min``, ``2h``).

    Raises
    ------
    ValueError
        Naming the option and the value.
    """
    s = str(text).strip().lower()
    m = re.fullmatch(r"(\d+)", s)
    if m and int(m.group(1)) >= 1:
        return HealthBlock(frames=int(m.group(1)))
    m = re.fullmatch(r"(\d+(?:\.\d*)?|\.\d+)\s*(s|sec|min|h|d)", s)
    if m and float(m.group(1)) > 0 and math.isfinite(float(m.group(1))):
        return HealthBlock(seconds=float(m.group(1)) * _UNITS[m.group(2)])
    raise ValueError(f"--health-block must be a frame count >= 1 (e.g. 1000) or a duration "
                     f"with a unit s, min, h or d (e.g. 30min); got {text!r}")


class HealthWork:
    """The run's working folder, also writing each chunk's health parts.

    The health backward task returns ``(frames, sensors_part, spikes_part)`` in the frames
    slot of the chain; :meth:`write_parts` writes the frames and query tables as the working
    folder does and the two health parts as ``.npz`` data beside them. Everything else is the
    wrapped folder's.
    """

    def __init__(self, work):
        self._work = work

    def __getattr__(self, name):
        return getattr(self._work, name)

    def write_parts(self, i, fmt, frames, query):
        """Write chunk ``i``'s tables and its health parts."""
        ftab, sens, spk = frames
        self._work.dump(sens, health_part("hsens", i))
        self._work.dump(spk, health_part("hspk", i))
        self._work.write_parts(i, fmt, ftab, query)


def health_part(what, i):
    """Return the file name of chunk ``i``'s health part ``what``."""
    return f"{what}-{i:06d}.npz"


def forward_task(kmodel, carry, chunk, last_time):
    """Filter one chunk (an engine task): ``(carry, part, info, last_time)``.

    The part also holds the readings judged faulty: ``spike_k`` (accepted-frame index),
    ``spike_s`` (sensor index), ``spike_p`` (probability).
    """
    info, last = chunk_info(chunk, last_time)
    acc = info["acc"]
    t, Y = np.ascontiguousarray(seconds(chunk.t[acc])), np.ascontiguousarray(chunk.Y[acc])
    carry, cp, nis, _, n_used, fault = filter_chunk(kmodel, carry, t, Y, every=SEGMENT, faults=True)
    k, s = np.nonzero(fault > SPIKE_PROBABILITY)
    part = {"t": t, "Y": Y, "cp": cp, "nis": nis, "n_used": n_used,
            "spike_k": k.astype(np.int64), "spike_s": s.astype(np.int64),
            "spike_p": fault[k, s]}
    return carry, part, info, last


def _block_sums(block, t, om, ov, flagged):
    """Per block (contiguous runs of ``block``) and sensor: counts and sums of the offsets."""
    if not len(block):
        e = np.empty((0, om.shape[1]))
        return {"block": np.empty(0, np.int64), "t0": t[:0], "t1": t[:0],
                "n": np.empty(0, np.int64), "sum_m": e, "sum_v": e, "spikes": e.astype(np.int64)}
    starts = np.r_[0, np.flatnonzero(np.diff(block)) + 1]
    ends = np.r_[starts[1:], len(block)]
    return {"block": block[starts], "t0": t[starts], "t1": t[ends - 1],
            "n": (ends - starts).astype(np.int64),
            "sum_m": np.add.reduceat(om, starts, axis=0),
            "sum_v": np.add.reduceat(ov, starts, axis=0),
            "spikes": np.add.reduceat(flagged.astype(np.int64), starts, axis=0)}


def backward_task(kmodel, n_coef, block, trusted, part, back, info, Hq, labels, z, kind):
    """Smooth one chunk (an engine task): ``(back, (frames, sensors part, spikes part), query)``.

    ``Hq`` is the chain's query design over the ``n_coef`` field coefficients (first row: the
    mean level); the offsets of the ``n_sensors`` sensors are added as rows ``[0, B_i]``.
    """
    ns = kmodel.H.shape[0]
    nq = Hq.shape[0]
    rows = np.vstack([np.hstack([Hq, np.zeros((nq, kmodel.n_coef - n_coef))]),
                      offset_rows(n_coef, ns, trusted)])
    back, _, qm, qs, _, _ = smooth_chunk(kmodel, part["cp"], back, part["t"], part["Y"], rows)
    ftab, qtab = chunk_tables_from(info, qm[:, 0], qs[:, 0], part["nis"], part["n_used"],
                                   qm[:, 1:nq], qs[:, 1:nq], labels, z, kind)
    acc = info["acc"]
    t_exact = info["t"][acc]
    flagged = np.zeros((len(t_exact), ns), bool)
    flagged[part["spike_k"], part["spike_s"]] = True
    sens = _block_sums(block.ids(info["frame"][acc], t_exact), t_exact, qm[:, nq:],
                       qs[:, nq:] ** 2, flagged)
    spk = {"t": t_exact[part["spike_k"]], "sensor": part["spike_s"], "p": part["spike_p"]}
    return back, (ftab, sens, spk), qtab


def health_steps(model, settings, block, trusted=None):
    """Return the chain steps of the health model on ``model`` (a ``CoefficientDynamics``)."""
    kmodel = augment(model, settings, trusted)
    return ChainSteps(partial(forward_task, kmodel),
                      partial(backward_task, kmodel, model.n_coef, block, trusted),
                      FilterCarry.initial(kmodel), BackwardCarry.final(kmodel),
                      lambda carry: carry.loglik, KERNEL_CLASSES, "h")


def health_chunks(job, source, engine, work, model):
    """Run the assimilation with the sensor-health model chunk after chunk.

    Yields
    ------
    ChunkDone

    Returns
    -------
    float
        The log-likelihood of the log (the robust update's mixture terms).
    """
    settings = HealthSettings(offset_sd=job.offset_sd, offset_rate=job.offset_rate)
    block = parse_block(job.health_block)
    sd, rate = settings.resolved(model.noise_var)
    how = "given" if job.offset_sd is not None else "default: 10 median noise sds"
    how_rate = "given" if job.offset_rate is not None else "default: 1 median noise sd"
    work.manifest["health"] = {
        "offset_sd": sd, "offset_sd_how": how, "offset_rate": rate,
        "offset_rate_how": how_rate,
        "offset_rate_unit": "sd of an offset's change over one time scale of the dynamics",
        "fault_prior": settings.fault_prior, "fault_scale": settings.fault_scale,
        "fault_scale_unit": "sd of a faulty reading's extra error, in noise sds of its sensor",
        "block": block.describe(),
        "references": ["Simon 2006 (bias states)", "Ting, Theodorou & Schaal 2007 (weighted "
                       "update)", "Agamennoni, Nieto & Nebot 2012 (good/faulty weights)"]}
    trusted = job.trusted
    if trusted is not None and trusted.any():
        work.manifest["health"]["reference"] = (
            f"anchored: the {int(trusted.sum())} sensor(s) marked trusted in the layout "
            f"({', '.join(str(s) for s in np.asarray(job.sensors)[trusted])}) have no offset")
    else:
        work.manifest["health"]["reference"] = (
            "zero sum: offsets sum to zero over the sensors of the layout (an offset common to "
            "every sensor is the mean level), each relative to the average of all sensors; "
            "a sensor's offset d biases the field's mean level by d / n_sensors")
    steps = health_steps(model, settings, block, trusted)
    return (yield from run_chain(job, source, engine, HealthWork(work), steps, model.n_coef))
