"""Log times in a form the user names (``--time-format``): epoch numbers or a strptime pattern.

Without a format a log's times are numbers (kept as written) or ISO 8601 date-times
(:func:`~invert.io.cells.time_cells`). A named format reads every time cell as a date-time:

* ``epoch-s``, ``epoch-ms``, ``epoch-us``, ``epoch-ns``: numbers counted from the Unix epoch
  (1970-01-01T00:00:00Z) in that unit. Epoch seconds and milliseconds pass through float64,
  whose spacing at today's epoch times is about 0.24 microseconds, so they are rounded to the
  microsecond (exact for any time written with up to 6 decimals of a second);
* any pattern with a ``%`` (Python ``strptime`` directives, e.g. ``%d/%m/%Y %H:%M:%S`` for
  day-first dates). Times the pattern does not match are unparseable; a pattern without a
  zone (``%z``) reads times as UTC.

Times come back as integer nanoseconds since the epoch (:data:`~invert.io.sources.NO_TIME`
where there is none), as for ISO 8601 logs.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from .sources import NO_TIME

__all__ = ["EPOCH_UNITS", "check_time_format", "parse_times"]

#: Epoch units and their nanoseconds.
EPOCH_UNITS = {"epoch-s": 10**9, "epoch-ms": 10**6, "epoch-us": 10**3, "epoch-ns": 1}


def check_time_format(fmt, where="--time-format"):
    """Return ``fmt`` if it is an epoch unit or a strptime pattern, else raise InputError."""
    if fmt is None or fmt in EPOCH_UNITS or "%" in str(fmt):
        return fmt
    raise InputError(where, f"{fmt!r} is neither an epoch unit ({', '.join(EPOCH_UNITS)}) "
                            f"nor a strptime pattern with % directives (e.g. '%d/%m/%Y %H:%M')")


def parse_times(cells, fmt):
    """Parse time cells in the format ``fmt``.

    Parameters
    ----------
    cells : sequence of str or None, or of numbers
        One time cell per frame (None or blank: missing).
    fmt : str
        An :data:`EPOCH_UNITS` key or a strptime pattern.

    Returns
    -------
    t : ndarray of int64
        Nanoseconds since the Unix epoch, UTC (``NO_TIME`` where not parsed).
    bad : ndarray of int8
        0 parsed, 1 unparseable, 2 blank (missing).

    Examples
    --------
    >>> t, bad = parse_times(["1709251201.010", "", "x"], "epoch-s")
    >>> t[0], bad.tolist()
    (np.int64(1709251201010000000), [0, 2, 1])
    """
    import pandas as pd

    s = pd.Series(list(cells), dtype=object)
    text = s.map(lambda c: "" if c is None or (isinstance(c, float) and np.isnan(c))
                 else str(c).strip())
    blank = (text == "").to_numpy()
    if fmt in EPOCH_UNITS:
        v = pd.to_numeric(text, errors="coerce").to_numpy(float)
        ok = np.isfinite(v) & ~blank
        scale = EPOCH_UNITS[fmt]
        if scale >= 1000:  # through float64: to the microsecond
            us = np.round(np.where(ok, v, 0.0) * (scale // 1000))
            ok &= np.abs(us) < 9.2e15
            t = np.where(ok, us, 0).astype(np.int64) * 1000
        else:
            t = np.where(ok, np.round(np.where(ok, v, 0.0)), 0).astype(np.int64)
    else:
        dt = pd.to_datetime(text, format=fmt, errors="coerce", utc=True)
        ok = dt.notna().to_numpy() & ~blank
        t = dt.dt.tz_localize(None).to_numpy().astype("datetime64[ns]").view(np.int64)
    t = np.where(ok, t, NO_TIME)
    bad = np.where(blank, 2, np.where(ok, 0, 1)).astype(np.int8)
    return t, bad
