r"""The sensor-health outputs: ``sensors.<fmt>``, ``spikes.<fmt>``, the summary and warnings.

Per sensor and block of time (:class:`~invert.batch.health_chain.HealthBlock`), from the
chunks' parts (blocks that straddle two chunks are summed together):

- ``offset_mean``: the average over the block's frames of the smoothed offset mean;
- ``offset_sd``: the root mean square of the frames' smoothed offset sds. The sd of the
  block-averaged offset is at most this (Cauchy–Schwarz: every covariance is at most the
  product of the sds), so the interval ``offset_mean ± z·offset_sd`` (z of ``--level``) is
  conservative for the block average;
- ``spikes``: readings of the block with fault probability above 0.5;
- ``flag``: the interval lies away from zero by at least ``FLAG_MARGIN`` sds beyond its
  half-width, :math:`|m| \ge (z + \text{FLAG\_MARGIN})\,sd` (never for a trusted sensor,
  whose offset is 0 with sd 0).

Offsets are relative to the sensors marked trusted in the layout, else to the average of
all sensors (they sum to zero), see :mod:`invert.stages.assimilate.health`.
"""

from __future__ import annotations

import numpy as np

from ..io.sources import exact_times
from ..io.writers import write_table
from .health_chain import SPIKE_PROBABILITY, health_part
from .tables import time_array

__all__ = ["FLAG_MARGIN", "merge_health"]

#: Sds beyond the interval's half-width by which a flagged offset's interval clears zero.
FLAG_MARGIN = 2.0


def _load_parts(work, n_chunks):
    sens = [work.load(health_part("hsens", i)) for i in range(n_chunks)]
    spk = [work.load(health_part("hspk", i)) for i in range(n_chunks)]
    return sens, spk


def _combine(sens, ns):
    """Sum the parts per block (parts are in time order; a block may span two parts)."""
    sens = [s for s in sens if len(s["block"])]
    if not sens:
        e = np.empty((0, ns))
        return np.empty(0, np.int64), np.empty(0), np.empty(0), np.empty(0), e, e, e
    block = np.concatenate([s["block"] for s in sens])
    starts = np.r_[0, np.flatnonzero(np.diff(block)) + 1]
    ends = np.r_[starts[1:], len(block)]

    def cat(k):
        return np.concatenate([s[k] for s in sens])

    n = np.add.reduceat(cat("n"), starts)
    return (block[starts], cat("t0")[starts], cat("t1")[ends - 1], n,
            np.add.reduceat(cat("sum_m"), starts, axis=0) / n[:, None],
            np.sqrt(np.add.reduceat(cat("sum_v"), starts, axis=0) / n[:, None]),
            np.add.reduceat(cat("spikes"), starts, axis=0))


def _time_text(t, kind):
    if kind == "datetime" and exact_times(np.asarray([t])):
        return str(np.datetime64(int(t), "ns")) + "Z"
    return float(t)


def _sensors_table(sensors, t0, t1, n, mean, sd, spikes, flag, z, kind):
    import pyarrow as pa

    nb, ns = mean.shape
    col = np.repeat(np.arange(ns), nb)  # sensor-major: each sensor's blocks in time order

    def by(a):
        return np.asarray(a).T.ravel()

    m, s = by(mean), by(sd)
    return pa.table({
        "sensor": pa.array([str(sensors[i]) for i in col], pa.string()),
        "time_start": time_array(np.tile(t0, ns), kind),
        "time_end": time_array(np.tile(t1, ns), kind),
        "n_frames": pa.array(np.tile(n, ns).astype(np.int64)),
        "offset_mean": pa.array(m), "offset_sd": pa.array(s),
        "offset_lower": pa.array(m - z * s), "offset_upper": pa.array(m + z * s),
        "spikes": pa.array(by(spikes).astype(np.int64)), "flag": pa.array(by(flag)),
    })


def _spikes_table(spk, sensors, kind):
    import pyarrow as pa

    t = np.concatenate([s["t"] for s in spk]) if spk else np.empty(0)
    idx = np.concatenate([s["sensor"] for s in spk]).astype(int) if spk else np.empty(0, int)
    p = np.concatenate([s["p"] for s in spk]) if spk else np.empty(0)
    return pa.table({"time": time_array(t, kind),
                     "sensor": pa.array([str(sensors[i]) for i in idx], pa.string()),
                     "probability": pa.array(p, pa.float64())})


def _flagged(sensors, t0, mean, sd, flag, kind):
    out, warnings = [], []
    for i in np.flatnonzero(flag.any(axis=0)):
        rows = np.flatnonzero(flag[:, i])
        worst = rows[np.argmax(np.abs(mean[rows, i]))]
        since = _time_text(t0[rows[0]], kind)
        out.append({"sensor": str(sensors[i]), "since": since,
                    "blocks_flagged": int(rows.size), "largest_offset": float(mean[worst, i]),
                    "largest_offset_sd": float(sd[worst, i])})
        warnings.append(f"sensor {sensors[i]}: offset of {mean[worst, i]:.4g} ± "
                        f"{sd[worst, i]:.2g} (sd) at most, flagged from {since} "
                        f"({rows.size} block(s)); see sensors table")
    return out, warnings


def merge_health(work, n_chunks, out, fmt, *, sensors, z, kind, settings):
    """Merge the health parts into ``out/sensors.<fmt>`` and ``out/spikes.<fmt>``.

    Parameters
    ----------
    work : WorkFolder
    n_chunks : int
    out : Path
        The staging folder.
    fmt : {"csv", "parquet"}
    sensors : sequence of str
        Sensor ids in layout order.
    z : float
        Interval half-width in sds.
    kind : {"number", "datetime"}
    settings : dict
        Model settings for the summary (offset sd and rate, fault prior and scale, block).

    Returns
    -------
    summary : dict
        summary.json's ``sensor_health`` entry.
    warnings : list of str
        One per flagged sensor.
    """
    sens, spk = _load_parts(work, n_chunks)
    _, t0, t1, n, mean, sd, spikes = _combine(sens, len(sensors))
    flag = (np.abs(mean) >= (z + FLAG_MARGIN) * sd) & (sd > 0)  # trusted sensors: sd 0
    write_table(_sensors_table(sensors, t0, t1, n, mean, sd, spikes, flag, z, kind),
                out / f"sensors.{fmt}", fmt)
    write_table(_spikes_table(spk, sensors, kind), out / f"spikes.{fmt}", fmt)
    flagged, warnings = _flagged(sensors, t0, mean, sd, flag, kind)
    n_spikes = int(sum(len(s["p"]) for s in spk))
    summary = {**settings,
               "flag_rule": f"|offset_mean| >= (z + {FLAG_MARGIN:g}) offset_sd, z = {z:.4g}",
               "spike_rule": f"fault probability > {SPIKE_PROBABILITY:g}",
               "n_blocks": int(len(n)), "spikes": n_spikes, "flagged": flagged}
    if flagged and str(settings.get("reference", "")).startswith("zero sum"):
        bias = sum(abs(f["largest_offset"]) for f in flagged) / len(sensors)
        warnings.append(f"no sensor is marked trusted, so offsets are relative to the average of "
                        f"all {len(sensors)} sensors: the field's mean level absorbs 1/"
                        f"{len(sensors)} of each flagged offset (here up to {bias:.3g}), which "
                        f"its intervals do not include; mark trusted sensors in a 'trusted' "
                        f"column of the layout")
    if n_spikes:
        warnings.append(f"{n_spikes} reading(s) judged faulty (probability > "
                        f"{SPIKE_PROBABILITY:g}) were down-weighted; see spikes table")
    return summary, warnings
