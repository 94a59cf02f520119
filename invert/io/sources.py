"""Log sources: where logged frames come from, behind one protocol.

The batch job (:mod:`invert.batch`) asks a log source for four things only: its chunks of
frames, a resume signature, how its columns map onto the layout's sensors, and the kind of its
times. A new source (a long-format file ``time,sensor,value``, a SQL table) is one new module
with a class implementing :class:`LogSource`, and one line in :func:`invert.io.logs.open_log`
(which source reads which log).
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Protocol, runtime_checkable

import numpy as np

__all__ = ["Chunk", "LogSource", "NO_TIME", "seconds", "has_time", "exact_times",
           "concat_times"]

#: ``Chunk.t`` of a date-time log where a frame has no usable time (integer nanoseconds).
NO_TIME = np.iinfo(np.int64).min


def seconds(t):
    """Return frame times as float seconds, for computation (NaN where there is none).

    Date-time logs carry ``Chunk.t`` as exact integer nanoseconds since the Unix epoch (UTC),
    so that outputs give back the log's own times; the filters work in float seconds (a
    resolution of about 0.2 microseconds at today's epoch times, far below any logger step).
    Numeric times are returned unchanged.
    """
    t = np.asarray(t)
    if not exact_times(t):
        return t
    out = t / 1e9
    out[t == NO_TIME] = np.nan
    return out


def has_time(t):
    """Return where ``t`` (float seconds or integer nanoseconds) holds a time."""
    t = np.asarray(t)
    return t != NO_TIME if exact_times(t) else np.isfinite(t)


def exact_times(t):
    """Return whether ``t`` holds integer nanoseconds (a date-time log's exact times)."""
    return np.issubdtype(np.asarray(t).dtype, np.integer)


def concat_times(parts):
    """Concatenate time arrays of one log; float parts among date-time ones hold no time.

    A part read before the log's time kind was known (blank times only) comes as float NaN;
    beside integer-nanosecond parts it becomes :data:`NO_TIME`.
    """
    if any(exact_times(t) for t in parts):
        parts = [t if exact_times(t) else np.full(len(t), NO_TIME) for t in parts]
    return np.concatenate(parts)


@dataclass
class Chunk:
    """One chunk of frames, in log order.

    Attributes
    ----------
    frame : ndarray of int64, shape (L,)
        0-based record number in the log (``-1`` for malformed lines found by the CSV parser).
    t : ndarray of float or int64, shape (L,)
        Numeric logs: the number as written (float; NaN when unparseable). Date-time logs:
        exact integer nanoseconds since the Unix epoch, UTC (:data:`NO_TIME` when
        unparseable); :func:`seconds` gives float seconds for computation.
    Y : ndarray of shape (L, n_sensors)
        Readings in layout order; NaN where missing (or where the cell was rejected).
    reason : ndarray of object, shape (L,)
        Rejection reason or None.
    digest : str or None
        Content hash (hex) of the bytes the chunk was read from, or None when the source
        cannot give one; a resumed run compares it with the hash recorded when the chunk was
        first read (:class:`~invert.batch.checkpoint.CheckedLog`).
    """

    frame: np.ndarray
    t: np.ndarray
    Y: np.ndarray
    reason: np.ndarray
    digest: str | None = None

    def __len__(self):
        return len(self.t)


@runtime_checkable
class LogSource(Protocol):
    """What the batch job may ask of a log (the contract every source implements).

    Attributes
    ----------
    source : str
        Name used in messages (a file name, a table name); :class:`~invert.errors.InputError`
        lines start with it.
    sensors : list of str
        The layout's sensor ids, in layout order: column ``j`` of every ``Chunk.Y`` is
        ``sensors[j]``.
    columns : list of (str, int)
        The column mapping: each sensor column of the source as ``(name in the source, index
        in sensors)``. A source column that is not a layout sensor, or a sensor given twice, is
        an :class:`~invert.errors.InputError` raised when the source is opened.
    missing_sensors : list of str
        Layout sensors with no column in the source (always missing; the job warns).
    time_kind : {"number", "datetime"} or None
        Fixed by the first parseable time (None before): numbers are written as read,
        date-times as integer nanoseconds since the Unix epoch (UTC) in ``Chunk.t``.
    warnings : list of str
        Things found while reading that the user must hear of (e.g. a header line repeated
        mid-file with the columns re-mapped), one sentence each, gathered as the chunks are
        read; the job copies them into ``summary.json``'s warnings.

    Methods
    -------
    __iter__()
        Chunks of about the requested number of frames, in source order. Every record comes
        back exactly once as a frame, numbered by its 0-based place in the source
        (``Chunk.frame``, increasing), with ``Chunk.reason`` set instead of dropping a record
        that cannot be used (bad cell, unparseable time, malformed row). Iterating again
        starts again from the first record and gives the same chunks (the job reads a source
        more than once: calibration, resume). Memory stays bounded by a few chunks. Each chunk
        carries the content hash of what it was read from (``Chunk.digest``) when it can.
    signature()
        A JSON-serialisable dict that changes whenever the data may have changed (for a file:
        path, size, modification time). A resumed run refuses a source whose signature differs
        from the interrupted run's, and then any chunk whose ``digest`` differs.

    Notes
    -----
    Times need not be sorted: the job gives a frame whose time is not after the last accepted
    one the status ``rejected`` (:func:`invert.batch.statuses.frame_statuses`).
    """

    source: str
    sensors: list
    columns: list
    missing_sensors: list
    time_kind: str | None
    warnings: list

    def __iter__(self) -> Iterator[Chunk]:
        """Yield the chunks of the log in order."""
        ...

    def signature(self) -> dict:
        """Return the resume signature of the data."""
        ...
