"""How a CSV file is written: delimiter, decimal mark and text encoding, detected or given.

Spreadsheets and loggers set to a European locale export semicolon-separated files with
decimal commas (``T01;0,25;0,0;81,3``); others write tab-separated files, and older tools write
Latin-1 text (a degree sign ``0xB0`` in a comment line). :func:`detect_dialect` looks at the
first data lines: the delimiter is the one of comma, semicolon and tab that splits the header
into more than one cell and the rows into as many cells as the header (the header decides, so
decimal commas never pass for a delimiter); the decimal mark is a comma when numbers such as
``0,25`` occur and none such as ``0.25``. Text that is not UTF-8 is read as Latin-1 (every
byte is a Latin-1 character, so this never fails). Every assumption is returned as a note
(:attr:`Dialect.notes`) for the summary, and ``sep``/``decimal`` overrides (the command
line's ``--sep``/``--decimal``) replace detection.

:func:`read_table` reads a small CSV (readings, points, layouts) with the detected dialect:
records may span lines inside quotes (the record's first line is its row number), a cell over
the csv module's field limit or a stray quote is one :class:`~invert.errors.InputError` line.
"""

from __future__ import annotations

import csv
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["Dialect", "SEPARATORS", "DECIMALS", "parse_sep", "parse_decimal", "detect_dialect",
           "sniff_file", "decode", "read_table", "to_number_text"]

#: Delimiters looked for, in order of preference on a tie, with the names used in notes.
SEPARATORS = {",": "comma", ";": "semicolon", "\t": "tab"}
#: Decimal marks.
DECIMALS = {".": "point", ",": "comma"}
#: Spellings of the delimiter accepted by ``--sep``.
_SEP_NAMES = {",": ",", "comma": ",", ";": ";", "semicolon": ";", "\t": "\t", "\\t": "\t",
              "tab": "\t"}
#: Data lines looked at for the delimiter and decimal mark.
_SNIFF_LINES = 200
_COMMA_NUMBER = re.compile(r"^[+-]?\d+,\d+(?:[eE][+-]?\d+)?$")
_POINT_NUMBER = re.compile(r"^[+-]?(?:\d+\.\d*|\.\d+)(?:[eE][+-]?\d+)?$")


@dataclass(frozen=True)
class Dialect:
    """How a CSV file is written.

    Attributes
    ----------
    sep : str
        Delimiter: ``","``, ``";"`` or a tab.
    decimal : str
        Decimal mark of numbers: ``"."`` or ``","``.
    encoding : str
        ``"utf-8"`` or ``"latin-1"``.
    notes : tuple of str
        What was assumed and not given (a non-comma delimiter found, decimal commas, a
        Latin-1 fallback), one sentence each, naming the file.
    """

    sep: str = ","
    decimal: str = "."
    encoding: str = "utf-8"
    notes: tuple = ()

    def describe(self):
        """Return a dict for summary.json (delimiter, decimal mark and encoding by name)."""
        return {"delimiter": SEPARATORS[self.sep], "decimal": DECIMALS[self.decimal],
                "encoding": self.encoding}


def parse_sep(text):
    """Return the delimiter named by ``--sep`` (``,``, ``;``, ``tab``), or None for None."""
    if text is None:
        return None
    key = text if text in _SEP_NAMES else text.strip().lower()
    if key not in _SEP_NAMES:
        raise ValueError(f"--sep must be one of ',', ';', 'tab'; got {text!r}")
    return _SEP_NAMES[key]


def parse_decimal(text):
    """Return the decimal mark named by ``--decimal`` (``.`` or ``,``), or None for None."""
    if text is None:
        return None
    t = text.strip().lower()
    t = {"point": ".", "comma": ","}.get(t, t)
    if t not in DECIMALS:
        raise ValueError(f"--decimal must be '.' or ','; got {text!r}")
    return t


def decode(data, source):
    """Decode file bytes as UTF-8 (a BOM dropped), else as Latin-1 with a note.

    Returns
    -------
    text : str
    encoding : {"utf-8", "latin-1"}
    note : str or None
    """
    try:
        return data.decode("utf-8-sig"), "utf-8", None
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        return data.decode("latin-1"), "latin-1", (
            f"{source}: not valid UTF-8 (first at line {line}, byte 0x{data[exc.start]:02x}); "
            f"read as Latin-1 (ISO-8859-1)")


def _data_lines(lines, comment="#"):
    return [ln for ln in lines if ln.strip() and not ln.lstrip().startswith(comment)]


def _split(lines, sep):
    try:
        return list(csv.reader(lines, delimiter=sep))
    except csv.Error:
        return None


def _choose_sep(lines):
    best, best_score = ",", -1.0
    for sep in SEPARATORS:
        rows = _split(lines, sep)
        if not rows or len(rows[0]) < 2:
            continue
        width = len(rows[0])
        rest = rows[1:]
        score = 1.0 if not rest else sum(len(r) == width for r in rest) / len(rest)
        if score > best_score:
            best, best_score = sep, score
    return best


def _choose_decimal(rows, source):
    comma = point = None
    for k, r in enumerate(rows[1:], start=1):
        for c in r:
            c = c.strip()
            if comma is None and _COMMA_NUMBER.match(c):
                comma = (k, c)
            elif point is None and _POINT_NUMBER.match(c):
                point = (k, c)
        if comma and point:
            raise InputError(source, f"numbers are written with both a decimal comma "
                             f"({comma[1]!r}) and a decimal point ({point[1]!r}); give "
                             f"--decimal ',' or --decimal '.'")
    return "," if comma else "."


def detect_dialect(lines, source, *, sep=None, decimal=None, encoding="utf-8", notes=()):
    """Detect the delimiter and decimal mark from the first lines of a CSV.

    Parameters
    ----------
    lines : sequence of str
        Lines of the file from its start (comments and blank lines are skipped).
    source : str
        File name for notes and messages.
    sep, decimal : str, optional
        Given by the user: not detected, and no note.
    encoding : str, default="utf-8"
    notes : sequence of str
        Notes so far (the encoding's).

    Returns
    -------
    Dialect

    Raises
    ------
    InputError
        When the numbers use both decimal marks and ``decimal`` is not given.
    """
    data = _data_lines(lines)[:_SNIFF_LINES]
    notes = list(notes)
    if sep is None:
        sep = _choose_sep(data)
        if sep != ",":
            notes.append(f"{source}: read as {SEPARATORS[sep]}-separated (detected; give "
                         f"--sep to choose)")
    if decimal is None:
        rows = _split(data, sep) or []
        decimal = _choose_decimal(rows, source) if rows else "."
        if decimal == ",":
            notes.append(f"{source}: numbers read with a decimal comma (detected; give "
                         f"--decimal to choose)")
    return Dialect(sep, decimal, encoding, tuple(notes))


def sniff_file(path, source=None, *, sep=None, decimal=None, nbytes=1 << 16):
    """Detect the dialect of a (possibly large) CSV file from its first ``nbytes`` bytes."""
    source = source or Path(path).name
    with open(path, "rb") as fh:
        head = fh.read(nbytes)
    if len(head) == nbytes and b"\n" in head:
        head = head[:head.rfind(b"\n") + 1]  # whole lines only
    text, encoding, note = decode(head, source)
    return detect_dialect(text.splitlines(), source, sep=sep, decimal=decimal,
                          encoding=encoding, notes=[note] if note else [])


def to_number_text(text, decimal):
    """Return a cell's text with ``decimal`` turned into a point (``"0,25"`` -> ``"0.25"``).

    With a decimal comma, a cell holding a point as well (``"1.234,5"``, digit grouping) is
    returned unchanged so that it fails as "not a number" with its text as written.
    """
    if decimal == "," and "," in text and "." not in text:
        return text.replace(",", ".", 1) if text.count(",") == 1 else text
    return text


def _records(kept, sep, source):
    """Return the CSV records of ``kept`` ((line number, text) pairs), each with its first line."""
    starts = []

    def feed():
        for n, ln in kept:
            starts.append(n)
            yield ln

    reader = csv.reader(feed(), delimiter=sep, strict=False)
    out = []
    while True:
        before = len(starts)
        try:
            cells = next(reader)
        except StopIteration:
            return out
        except csv.Error as exc:
            line = starts[before] if len(starts) > before else (starts[-1] if starts else None)
            raise InputError(source, _csv_problem(exc), row=line) from None
        out.append((starts[before], cells))


def _csv_problem(exc):
    text = str(exc)
    if "field larger than field limit" in text:
        return (f"a cell is longer than {csv.field_size_limit()} characters, the CSV field "
                f"limit (an unclosed quote runs on over the following lines?)")
    return f"cannot be read as CSV ({text})"


def read_table(path, *, source=None, sep=None, decimal=None):
    """Read a small CSV file into ``(header, rows, line_numbers, dialect)``.

    Lines starting with ``#`` and blank lines are skipped (their numbers still count, so
    messages match what an editor shows). Column names are stripped and lower-cased. The
    dialect is detected (:func:`detect_dialect`) unless given.

    Returns
    -------
    header : list of str
    rows : list of list of str
        Cells stripped, padded with blanks to the header's width.
    numbers : ndarray of int
        The line on which each record starts (1-based).
    dialect : Dialect

    Raises
    ------
    InputError
        If the file cannot be read, is empty, has no header, a row has more cells than the
        header, or a cell is over the field limit.
    """
    source = source or Path(path).name
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError(source, "file not found") from None
    except IsADirectoryError:
        raise InputError(source, "is a folder, not a file") from None
    except OSError as exc:
        raise InputError(source, f"cannot be read ({exc.strerror or exc})") from None
    text, encoding, note = decode(data, source)
    lines = text.splitlines(keepends=True)
    kept = [(i + 1, ln) for i, ln in enumerate(lines)
            if ln.strip() and not ln.lstrip().startswith("#")]
    if not kept:
        raise InputError(source, "the file is empty (no header and no rows)")
    dialect = detect_dialect([ln for _, ln in kept], source, sep=sep, decimal=decimal,
                             encoding=encoding, notes=[note] if note else [])
    records = _records(kept, dialect.sep, source)
    header = [h.strip().lower() for h in records[0][1]]
    if len(set(header)) != len(header):
        dup = next(h for h in header if header.count(h) > 1)
        raise InputError(source, f"column '{dup}' appears twice in the header",
                         row=records[0][0])
    rows, numbers = [], []
    for lineno, cells in records[1:]:
        if len(cells) > len(header):
            hint = (" (is the delimiter another one? give --sep)" if len(header) == 1
                    else "")
            raise InputError(source, f"has {len(cells)} cells but the header has "
                             f"{len(header)}{hint}", row=lineno)
        cells = cells + [""] * (len(header) - len(cells))
        rows.append([c.strip() for c in cells])
        numbers.append(lineno)
    return header, rows, np.asarray(numbers, dtype=int), dialect
