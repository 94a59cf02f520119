"""The two output tables of a batch run, as Arrow tables built from numpy arrays.

``frames``: ``time, frame, status, reason, n_used, centre_mean, centre_sd, chi2`` (one row
per input frame); ``query``: ``time, label, mean, sd, lower, upper`` (one row per query point
of each frame with an estimate). Both the static and the assimilation mode write through here,
so the formats agree.
"""

from __future__ import annotations

import numpy as np

from ..io.arrow import arrow_numbers, arrow_strings
from ..io.sources import NO_TIME, exact_times
from .statuses import STATUSES

__all__ = ["time_array", "frames_table", "query_table", "empty_query", "empty_frames",
           "release_memory"]


def time_array(t, kind):
    """Arrow time column: UTC nanosecond timestamps (``kind="datetime"``) or float64 seconds.

    Parameters
    ----------
    t : ndarray of float or int64
        Numbers (NaN gives a null), or date-times as integer nanoseconds since the Unix epoch
        (:data:`~invert.io.sources.NO_TIME` gives a null).
    kind : {"number", "datetime"}

    Returns
    -------
    pyarrow.Array
    """
    import pyarrow as pa

    if kind == "datetime" and exact_times(t):
        return arrow_numbers(t, pa.timestamp("ns", "UTC"), mask=t == NO_TIME)
    if kind == "datetime":
        ns = np.where(np.isfinite(t), np.round(np.nan_to_num(t) * 1e9), 0).astype(np.int64)
        return arrow_numbers(ns, pa.timestamp("ns", "UTC"), mask=~np.isfinite(t))
    return arrow_numbers(t, pa.float64(), mask=~np.isfinite(t))


def frames_table(t, frame, status, reason, n_used, cmean, csd, chi2, kind):
    """Build the ``frames`` table of one chunk (NaN estimates become nulls).

    Parameters
    ----------
    t : ndarray of float, shape (L,)
    frame : ndarray of int64, shape (L,)
    status, reason : ndarray of object, shape (L,)
    n_used : ndarray of int, shape (L,)
    cmean, csd, chi2 : ndarray of float, shape (L,)
    kind : {"number", "datetime"}

    Returns
    -------
    pyarrow.Table
    """
    import pyarrow as pa

    def col(v):
        return arrow_numbers(v, pa.float64(), mask=~np.isfinite(v))

    return pa.table({
        "time": time_array(t, kind),
        "frame": arrow_numbers(frame, pa.int64()),
        "status": _status_array(status),
        "reason": _reason_array(reason),
        "n_used": arrow_numbers(n_used, pa.int64()),
        "centre_mean": col(cmean),
        "centre_sd": col(csd),
        "chi2": col(chi2),
    })


def _status_array(status):
    import pyarrow as pa

    codes = np.zeros(len(status), np.int8)
    codes[status == "no-data"] = 1
    codes[status == "rejected"] = 2
    return pa.DictionaryArray.from_arrays(arrow_numbers(codes, pa.int8()),
                                          arrow_strings(STATUSES))


def _reason_array(reason):
    import pyarrow as pa

    has = ~np.equal(reason, None).astype(bool)
    if not has.any():
        return pa.nulls(len(reason), type=pa.string())
    return arrow_strings(reason)


def query_table(t, labels, qmean, qsd, z, kind):
    r"""Build the ``query`` table: frames by query points, interval :math:`m \pm z\,sd`.

    Parameters
    ----------
    t : ndarray of float, shape (L,)
    labels : sequence of str, length n_query
    qmean, qsd : ndarray of shape (L, n_query)
    z : float
        Half-width of the central interval in sds (:func:`invert.problem.interval_z`).
    kind : {"number", "datetime"}

    Returns
    -------
    pyarrow.Table
    """
    import pyarrow as pa

    L, nq = qmean.shape
    tt = np.repeat(t, nq)
    lab = pa.DictionaryArray.from_arrays(
        arrow_numbers(np.tile(np.arange(nq, dtype=np.int32), L), pa.int32()),
        arrow_strings([str(x) for x in labels]))
    m, s = qmean.ravel(), qsd.ravel()
    f64 = pa.float64()
    return pa.table({"time": time_array(tt, kind), "label": lab,
                     "mean": arrow_numbers(m, f64), "sd": arrow_numbers(s, f64),
                     "lower": arrow_numbers(m - z * s, f64),
                     "upper": arrow_numbers(m + z * s, f64)})


def empty_query(kind):
    """Return a ``query`` table with no rows."""
    return query_table(np.empty(0), ["x"], np.empty((0, 1)), np.empty((0, 1)), 1.0, kind)


def empty_frames(kind):
    """Return a ``frames`` table with no rows."""
    e = np.empty(0)
    return frames_table(e, np.empty(0, np.int64), np.empty(0, object), np.empty(0, object),
                        e, e, e, e, kind)


def release_memory():
    """Hand memory that Arrow's allocator keeps cached back to the system (flat memory)."""
    import pyarrow as pa

    pa.default_memory_pool().release_unused()
