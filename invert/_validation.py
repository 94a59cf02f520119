"""Input checks shared by readings, stages and the command line.

Every check raises :class:`InputError` (a ``ValueError``) whose text is one line naming the
file, the row or column, and what is wrong, so the command line can print it as it is.
"""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np

from .errors import InputError

__all__ = ["check_level", "read_table", "parse_number"]




def check_level(level, name="level", where="fit"):
    """Check a central-interval probability in (0, 1)."""
    try:
        ok = 0 < float(level) < 1
    except (TypeError, ValueError):
        ok = False
    if not ok:
        raise ValueError(
            f"The '{name}' parameter of {where} must be a float in the range (0, 1). "
            f"Got {level!r} instead."
        )
    return float(level)


def parse_number(text, source, row, column, *, allow_blank=False):
    """Parse one numeric cell; blank gives NaN when ``allow_blank``."""
    t = text.strip()
    if t == "" or t.lower() in ("nan", "na", "null"):
        if allow_blank:
            return math.nan
        raise InputError(source, "is blank; a number is required", row=row, column=column)
    try:
        v = float(t)
    except ValueError:
        raise InputError(source, f"is not a number: {t!r}", row=row, column=column) from None
    if not math.isfinite(v):
        raise InputError(source, f"must be finite, got {t!r}", row=row, column=column)
    return v


def read_table(path, *, source=None):
    """Read a small CSV file into ``(header, rows, line_numbers)``.

    Lines starting with ``#`` and blank lines are skipped (their numbers still count, so
    messages match what an editor shows). Column names are stripped and lower-cased.

    Raises
    ------
    InputError
        If the file cannot be read, is empty, has no header, or a row has more cells than the
        header.
    """
    source = source or Path(path).name
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            lines = fh.read().splitlines()
    except FileNotFoundError:
        raise InputError(source, "file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(source, f"cannot be read ({exc.__class__.__name__}: {exc})") from None
    kept = [(i + 1, ln) for i, ln in enumerate(lines)
            if ln.strip() and not ln.lstrip().startswith("#")]
    if not kept:
        raise InputError(source, "the file is empty (no header and no rows)")
    parsed = list(csv.reader([ln for _, ln in kept]))
    header = [h.strip().lower() for h in parsed[0]]
    if len(set(header)) != len(header):
        dup = next(h for h in header if header.count(h) > 1)
        raise InputError(source, f"column '{dup}' appears twice in the header", row=kept[0][0])
    rows, numbers = [], []
    for (lineno, _), cells in zip(kept[1:], parsed[1:], strict=True):
        if len(cells) > len(header):
            raise InputError(
                source, f"has {len(cells)} cells but the header has {len(header)}", row=lineno
            )
        cells = cells + [""] * (len(header) - len(cells))
        rows.append([c.strip() for c in cells])
        numbers.append(lineno)
    return header, rows, np.asarray(numbers, dtype=int)
