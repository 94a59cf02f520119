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

import re

import numpy as np

from ..errors import InputError
from .arrow import float_values
from .cells import time_cells
from .sources import NO_TIME

__all__ = ["EPOCH_UNITS", "NAIVE_NOTE", "TimeReader", "check_time_format", "parse_times"]

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


#: The warning for date-times without a zone (read as UTC, written with ``Z``).
NAIVE_NOTE = ("{source}: times without a time zone were read as UTC (outputs write them with "
              "'Z'); give times with an offset (e.g. +01:00) if the logger kept local time")
#: A date-time cell that ends without a zone (``Z`` or an offset such as ``+01:00``).
_NAIVE = re.compile(r"\d(?<![+-]\d\d:\d\d)(?<![+-]\d\d\d\d)$")


class TimeReader:
    """The time column of a log, read piece by piece with the log's kind of time kept.

    Parameters
    ----------
    source : str
        Name used in warnings.
    warnings : list of str
        The log's warnings (appended to: times read as UTC).
    fmt : str, optional
        A named form (:func:`check_time_format`); None: numbers, or ISO 8601 date-times.
    decimal : str, default="."
        Decimal mark of numeric times in text cells.

    Attributes
    ----------
    time_kind : {"number", "datetime"} or None
        Fixed by the first parseable time (``"datetime"`` from the start with ``fmt``).
    """

    def __init__(self, source, warnings, fmt=None, *, decimal="."):
        self.source, self.warnings, self.decimal = source, warnings, decimal
        self.fmt = check_time_format(fmt)
        self.time_kind = None if fmt is None else "datetime"

    def column(self, col):
        """Parse an Arrow time column: ``(t, bad)`` as :func:`parse_times` returns them."""
        import pyarrow as pa
        import pyarrow.compute as pc

        if self.fmt is not None and not (pa.types.is_timestamp(col.type)
                                                 or pa.types.is_date(col.type)):
            return parse_times(col.to_pylist(), self.fmt)
        if pa.types.is_timestamp(col.type) or pa.types.is_date(col.type):
            self.time_kind = self.time_kind or "datetime"
            if getattr(col.type, "tz", None) is None:
                self.note_naive()
            null = np.asarray(col.is_null().to_numpy(zero_copy_only=False))
            ns = col.cast(pa.timestamp("ns")).cast(pa.int64()).fill_null(NO_TIME)
            t = np.asarray(ns.to_numpy(zero_copy_only=False), np.int64)
            if self.time_kind != "datetime":
                return np.full(len(t), np.nan), np.ones(len(t), np.int8)
            return t, null.astype(np.int8) * 2
        if pa.types.is_floating(col.type) or pa.types.is_integer(col.type):
            t = float_values(col.cast(pa.float64()))
            if self.time_kind is None and np.isfinite(t).any():
                self.time_kind = "number"
            if self.time_kind == "datetime":
                return np.full(len(t), NO_TIME), np.ones(len(t), np.int8)
            bad = np.where(np.isnan(t), 2, np.where(np.isfinite(t), 0, 1)).astype(np.int8)
            return np.where(bad == 0, t, np.nan), bad
        if not pa.types.is_string(col.type):
            col = col.cast(pa.string())
        if self.time_kind in (None, "number"):
            try:
                t = np.asarray(pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False), float)
                if self.time_kind is None and np.isfinite(t).any():
                    self.time_kind = "number"
                if self.time_kind == "number":
                    null = np.asarray(col.is_null().to_numpy(zero_copy_only=False))
                    bad = np.where(null, 2, np.where(np.isfinite(t), 0, 1)).astype(np.int8)
                    return np.where(bad == 0, t, np.nan), bad
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                pass
        cells = np.array(col.to_pylist(), dtype=object)
        return self.cells(cells)

    def cells(self, cells):
        """Per-cell time parsing (slow path): numbers, or ISO 8601 date-times."""
        if self.fmt is not None:
            return parse_times(cells, self.fmt)
        t, bad, self.time_kind = time_cells(cells, self.time_kind, self.decimal)
        if self.time_kind == "datetime" and _NAIVE.search(str(next(
                (c for c, b in zip(cells, bad, strict=True) if b == 0), "")) or "~"):
            self.note_naive()
        return t, bad

    def note_naive(self):
        """Say once that times without a zone were read as UTC."""
        note = NAIVE_NOTE.format(source=self.source)
        if note not in self.warnings:
            self.warnings.append(note)
