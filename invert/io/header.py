"""The header of a wide log: which column is the time, which layout sensor each other one is.

A wide log's header names a ``time`` column (any case) and one column per sensor id of the
layout. :func:`parse_header` checks it once (a missing ``time`` column, a sensor not in the
layout, a sensor given twice are :class:`~invert.errors.InputError` lines) and returns the
column mapping as a :class:`Header`.

A logger that restarts may write its header again mid-file, possibly with the columns in
another order. :func:`header_lines` finds such lines in a piece of a CSV log: a line whose
first cell is ``time`` or a column name of the log or layout, and none of whose cells is a
number (names that read as numbers cannot be told from data, so are not looked for). The
reader then reads the frames after the line with the new header's mapping. A repeated header
is held to the same rules as the first one, so one that cannot be mapped (no ``time`` column,
an unknown or doubled sensor) is an :class:`~invert.errors.InputError` naming its line; it is
never read as a frame.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass

from ..errors import InputError

__all__ = ["Header", "parse_header", "header_pattern", "header_lines"]

#: Columns listed in the message about a missing time column.
_SHOWN = 8


@dataclass(frozen=True)
class Header:
    """The column mapping of a wide log, from one header line.

    Attributes
    ----------
    raw_names : tuple of str
        The cells of the header line, as written.
    time_index : int
        Position of the time column.
    columns : tuple of (str, int)
        Each sensor column as (name as written, index of the sensor in the layout).
    line : int or None
        Line of the file the header was read from (None for a Parquet schema).
    """

    raw_names: tuple
    time_index: int
    columns: tuple
    line: int | None = None

    @property
    def time_name(self):
        """The time column's name as written."""
        return self.raw_names[self.time_index]

    def same_mapping(self, other):
        """Whether ``other`` reads every column as this header does."""
        return self.raw_names == other.raw_names


def parse_header(names, sensors, source, *, line=None):
    """Check a header line against the layout and return its column mapping.

    Parameters
    ----------
    names : sequence of str
        The header's cells.
    sensors : sequence of str
        The layout's sensor ids, in layout order.
    source : str
        File name for messages.
    line : int, optional
        Line of the header in the file (named in the messages of a repeated header).

    Returns
    -------
    Header

    Raises
    ------
    InputError
        No ``time`` column (naming the columns found), a sensor column not in the layout, or
        a sensor given twice.
    """
    clean = [str(n).strip() for n in names]
    lower = [c.lower() for c in clean]
    if "time" not in lower:
        shown = ", ".join(repr(c) for c in clean[:_SHOWN]) + (", ..." if len(clean) > _SHOWN
                                                                else "")
        raise InputError(source, f"no 'time' column (columns found: {shown}); the first "
                         f"column is not taken as time", row=line, column="time")
    time_index = lower.index("time")
    pos = {s: j for j, s in enumerate(sensors)}
    seen = set()
    columns = []
    for i, c in enumerate(clean):
        if i == time_index:
            continue
        if c not in pos:
            raise InputError(source, f"sensor '{c}' is not in the layout", row=line, column=c)
        if c in seen:
            raise InputError(source, f"sensor column '{c}' appears twice", row=line, column=c)
        seen.add(c)
        columns.append((str(names[i]), pos[c]))
    if not columns:
        raise InputError(source, f"no column of the log is a sensor of the layout (the "
                         f"header holds only '{clean[time_index]}'); the layout lists "
                         f"{', '.join(repr(s) for s in list(sensors)[:_SHOWN])}"
                         f"{', ...' if len(sensors) > _SHOWN else ''}", row=line)
    return Header(tuple(str(n) for n in names), time_index, tuple(columns), line)


def header_pattern(names, sensors, *, sep=","):
    """Return a regex (bytes) for lines whose first cell is ``time`` or a column/sensor name.

    ``sep`` is the log's delimiter (:mod:`invert.io.dialect`).
    """
    # names that read as numbers cannot tell a header from a data row: left out
    words = sorted({w for w in ("time", *(str(n).strip() for n in names), *map(str, sensors))
                    if w and not _is_number(w)}, key=len, reverse=True)
    alt = b"|".join(re.escape(w.encode()) for w in words)
    end = re.escape(sep.encode())
    return re.compile(rb'(?mi)^[ \t]*"?(?:' + alt + rb')"?[ \t]*(?:' + end + rb'|\r?$)')


def header_lines(piece, pattern, *, sep=","):
    """Header lines inside a piece of a CSV log.

    Parameters
    ----------
    piece : bytes
    pattern : re.Pattern
        From :func:`header_pattern`.
    sep : str, default=","
        The log's delimiter.

    Returns
    -------
    list of (int, int, int, list of str)
        ``(line index in the piece, start offset, end offset after the line end, cells)``.
    """
    out = []
    for m in pattern.finditer(piece):
        start = m.start()
        end = piece.find(b"\n", start)
        end = len(piece) if end < 0 else end + 1
        text = bytes(piece[start:end]).decode("utf-8", errors="replace").rstrip("\r\n")
        cells = next(csv.reader([text], delimiter=sep))
        if any(_is_number(c) for c in cells):  # a data row (a header holds names only)
            continue
        out.append((piece.count(b"\n", 0, start), start, end, cells))
    return out


def _is_number(text):
    try:
        float(text)
    except ValueError:
        return False
    return True
