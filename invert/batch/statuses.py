"""Status of every frame: ``ok``, ``no-data`` or ``rejected`` with a reason.

A frame is accepted when its time exceeds that of every earlier accepted frame; static fits
also need a minimum number of readings. Counts per status and per reason are kept in the
run's manifest for the summary.
"""

from __future__ import annotations

import numpy as np

from ..io.sources import NO_TIME, exact_times

__all__ = ["STATUSES", "frame_statuses", "count_statuses"]

#: The statuses, in the order of their integer codes in the outputs.
STATUSES = ("ok", "no-data", "rejected")
_STATUS_NAMES = np.array(STATUSES, dtype=object)


def frame_statuses(chunk, last_time, *, min_readings=1):
    """Status of each frame of a chunk, given the last accepted time before it.

    Parameters
    ----------
    chunk : Chunk
    last_time : float or int
        Last accepted time before the chunk (``-inf`` at the start); an int (nanoseconds)
        after a chunk of a date-time log.
    min_readings : int, default=1
        Frames with at least one but fewer readings are rejected.

    Returns
    -------
    status : ndarray of str
    reason : ndarray of object
    accepted : ndarray of bool
        Frames with a usable time (ok or no-data).
    last_time : float
        Last accepted time after the chunk.
    """
    reason = chunk.reason.copy()
    valid = np.equal(reason, None).astype(bool)
    t = chunk.t
    exact = exact_times(t)  # date-times as integer nanoseconds: compared exactly
    lowest = NO_TIME if exact else -np.inf
    if exact and not np.isfinite(last_time):
        last_time = NO_TIME
    elif exact:
        last_time = int(last_time)
    # a valid frame is accepted iff its time exceeds every earlier valid time (rejected ones
    # never raise the running maximum, since they do not exceed it)
    prior = np.where(valid, t, lowest)
    run = np.maximum.accumulate(np.concatenate([np.array([last_time], t.dtype), prior]))[:-1]
    dup = valid & (t == run)
    back = valid & (t < run)
    reason[dup] = "duplicate time"
    reason[back] = "time out of order (earlier than a previous frame)"
    accepted = valid & ~dup & ~back
    n_used = np.isfinite(chunk.Y).sum(axis=1)
    few = accepted & (n_used > 0) & (n_used < min_readings)
    for i in np.flatnonzero(few):
        reason[i] = f"only {n_used[i]} reading(s); a fit needs at least {min_readings}"
    code = np.where(accepted & ~few, np.where(n_used > 0, 0, 1), 2)
    status = _STATUS_NAMES[code]
    accepted &= ~few
    cast = int if exact else float
    new_last = cast(np.max(t[accepted])) if accepted.any() else last_time
    if exact and last_time == NO_TIME and not accepted.any():
        return status, reason, accepted, -np.inf
    return status, reason, accepted, max(new_last, last_time)


def count_statuses(manifest, status, reason):
    """Add a chunk's statuses and rejection reasons to the counts in ``manifest`` (in place).

    Parameters
    ----------
    manifest : dict
        Gets (or updates) ``"counts"`` (status -> frames) and ``"reasons"`` (reason, without
        its details after ``:``, `` at line`` or an unparseable time's text, -> frames).
    status, reason : ndarray
        As returned by :func:`frame_statuses`.
    """
    counts = manifest.setdefault("counts", {})
    reasons = manifest.setdefault("reasons", {})
    for v in sorted(STATUSES):  # the order np.unique gave
        c = int(np.count_nonzero(status == v))
        if c:
            counts[v] = counts.get(v, 0) + c
    for r in reason[~np.equal(reason, None).astype(bool)]:
        key = str(r).split(":")[0].split(" at line")[0]
        if key.startswith("unparseable time '"):  # one tally, not one per cell text
            key = "unparseable time"
        reasons[key] = reasons.get(key, 0) + 1
