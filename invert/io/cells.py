"""Cells of a CSV log read one by one (the slow paths of the wide reader), and line counting.

Used by :class:`~invert.io.wide.WideLogReader` only when pyarrow's typed conversion of a piece
fails (a bad cell, a date-time column) or a row is malformed.
"""

from __future__ import annotations

import numpy as np

from .sources import NO_TIME

__all__ = ["NULLS", "time_cells", "parse_cells", "LineCounter"]

#: Cells read as missing readings (pyarrow's defaults cover these and more).
NULLS = ["", "NaN", "nan", "NA", "N/A", "null", "NULL", "None", "-nan", "#N/A"]


def time_cells(cells, kind, decimal="."):
    """Parse time cells one by one (slow path): numbers, or ISO 8601 date-times.

    Parameters
    ----------
    cells : ndarray of object
        The cells as text (None for a null).
    kind : {"number", "datetime"} or None
        The log's time kind so far; None: fixed here by the first non-blank cell.
    decimal : {".", ","}, default="."
        Decimal mark of numeric times (:mod:`invert.io.dialect`).

    Returns
    -------
    t : ndarray of float or int64
        Numbers as float (NaN where not parsed); date-times as integer nanoseconds since the
        Unix epoch, UTC (``NO_TIME`` where not parsed).
    bad : ndarray of int8
        0 parsed, 1 unparseable, 2 blank (missing).
    kind : {"number", "datetime"} or None
    """
    import pandas as pd

    n = len(cells)
    t = np.full(n, np.nan)
    bad = np.zeros(n, np.int8)
    text = np.array(["" if c is None else str(c).strip() for c in cells], dtype=object)
    blank = np.array([x == "" or x in NULLS for x in text])
    bad[blank] = 2
    num = pd.to_numeric(_points(pd.Series(text), decimal), errors="coerce").to_numpy(float)
    if kind is None:
        first = next((i for i in range(n) if not blank[i]), None)
        if first is not None:
            kind = "number" if np.isfinite(num[first]) else "datetime"
    if kind == "number":
        ok = np.isfinite(num) & ~blank
        t[ok] = num[ok]
    elif kind == "datetime":
        dt = pd.to_datetime(pd.Series(text), errors="coerce", format="ISO8601", utc=True)
        ok = dt.notna().to_numpy() & ~blank
        # nanoseconds whatever unit pandas chose (pandas 3 may give microseconds)
        vals = dt.dt.tz_localize(None).to_numpy().astype("datetime64[ns]").view(np.int64)
        t = np.where(ok, vals, NO_TIME)
    else:
        ok = np.zeros(n, bool)
    bad[~ok & ~blank] = 1
    return t, bad, kind


class LineCounter:
    """Number of lines before a byte offset of a file, counted on demand, front to back."""

    def __init__(self, path, offset, lines):
        self.path, self.offset, self.lines = path, offset, lines

    def before(self, offset):
        """Return the number of lines before byte ``offset`` (offsets must not decrease)."""
        with open(self.path, "rb") as fh:
            fh.seek(self.offset)
            left = offset - self.offset
            while left > 0:
                data = fh.read(min(left, 1 << 24))
                if not data:
                    break
                self.lines += data.count(b"\n")
                left -= len(data)
        self.offset = offset
        return self.lines


def _points(text, decimal):
    """Cells as text with a decimal comma turned into a point (``decimal=","``)."""
    if decimal != ",":
        return text
    one = text.str.count(",").eq(1).to_numpy(bool) & \
        ~text.str.contains(".", regex=False).fillna(True).to_numpy(bool)
    return text.where(~one, text.str.replace(",", ".", regex=False))


def parse_cells(col, decimal="."):
    """Numbers from a string column cell by cell; ``bad`` marks non-blank non-numbers.

    ``decimal`` is the log's decimal mark (a comma: ``"80,3"`` reads as 80.3).
    """
    import pandas as pd

    s = pd.Series(col.to_pylist(), dtype=object)
    blank = s.isna().to_numpy()
    vals = pd.to_numeric(_points(s.str.strip(), decimal), errors="coerce").to_numpy(float)
    bad = np.isnan(vals) & ~blank
    # literal NaN spellings are missing readings, not bad cells
    low = s.str.strip().str.lower()
    bad &= ~low.isin([v.lower() for v in NULLS]).to_numpy()
    return vals, bad
