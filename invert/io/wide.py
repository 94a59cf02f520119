"""Wide logs, CSV or Parquet: one time column and one column per sensor (a :class:`LogSource`).

The time column is named ``time`` (any case; a log without one is an
:class:`~invert.errors.InputError` naming the columns found, never read with another column as
time); every other column is a sensor id of the layout (:mod:`invert.io.header`); a blank or
NaN cell is a missing reading. Every record comes back as a frame, with a rejection reason
when it cannot be used (text in a number, an unparseable time, a row with the wrong number of
cells), so nothing is silently dropped. A header line repeated mid-file (a logger restarted)
is not a record: the frames after it are read with its column order, and the reader's
``warnings`` say at which line the header repeated. Each chunk carries the blake2b hash of the
bytes it was read from (``Chunk.digest``).
"""

from __future__ import annotations

import hashlib
import os
import re
from pathlib import Path

import numpy as np

from ..errors import InputError
from .arrow import float_values
from .cells import NULLS, LineCounter, parse_cells
from .dialect import Dialect, sniff_file
from .header import header_lines, header_pattern, parse_header
from .sources import Chunk, concat_times
from .times import TimeReader

__all__ = ["WideLogReader", "log_signature"]

_NONBLANK = re.compile(rb"\S")



def log_signature(path):
    """Return size and modification time of the log (a resumed run must see the same file)."""
    st = os.stat(path)
    return {"path": str(Path(path).resolve()), "size": st.st_size, "mtime_ns": st.st_mtime_ns}


class WideLogReader:
    """A wide CSV or Parquet log as a :class:`~invert.io.sources.LogSource`.

    Iterating gives chunks of about ``chunk_rows`` frames.

    Parameters
    ----------
    path : str or Path
        ``.parquet``/``.pq`` files are read with ``pyarrow.parquet.ParquetFile.iter_batches``,
        anything else as CSV: the file is cut into pieces of about ``chunk_rows`` lines at
        line ends and each piece parsed with ``pyarrow.csv.read_csv`` (all threads; every
        column as float64 first, then the time column as text for date-times, then everything
        as text with a cell-by-cell fallback when a piece holds a non-number). Leading lines
        starting with ``#`` are comments. Malformed lines (wrong number of cells) come back as
        rejected frames in their place, numbered and with their line in the file named in the
        reason (found by reading the piece line by line). When the rows do not add up, as
        after a stray quote that would run on over the following lines, the piece is parsed
        again without quoting, so the quote is a bad cell of its own row; should the counts
        still disagree, the malformed rows go to the end of their chunk with frame ``-1``.
        A header line repeated inside the file re-maps the columns from the next line on
        (the same checks as the first header: a repeated header without ``time`` or with a
        sensor not in the layout is an :class:`~invert.errors.InputError` naming its line).
    sensors : sequence of str
        Sensor ids from the layout; the log's sensor columns must be among them.
    chunk_rows : int, default=65536
    time_format : str, optional
        Read every time cell as a date-time in this form (:mod:`invert.io.times`: an epoch
        unit or a strptime pattern); default: numbers as written, or ISO 8601 date-times.
    table : SqlTable, optional
        Read this database table (Arrow record batches) instead of a file.
    sep, decimal : str, optional
        Delimiter and decimal mark of a CSV log; detected from its first lines when None
        (:func:`~invert.io.dialect.sniff_file`; what was assumed goes into ``warnings``).
    """

    def __init__(self, path, sensors, *, chunk_rows=65536, time_format=None, table=None,
                 sep=None, decimal=None):
        self.table = table
        self.path = None if table is not None else Path(path)
        self.source = table.source if table is not None else self.path.name
        self.sensors = [str(s) for s in sensors]
        self.chunk_rows = int(chunk_rows)
        if table is None and not self.path.exists():
            raise InputError(self.source, "file not found")
        # Arrow record batches: a Parquet file, or a table of a database
        self.is_parquet = table is not None or self.path.suffix.lower() in (".parquet", ".pq")
        self.dialect = Dialect() if self.is_parquet else sniff_file(
            self.path, self.source, sep=sep, decimal=decimal)
        self.sep, self.decimal = self.dialect.sep, self.dialect.decimal
        names = self._names()
        self.header = parse_header(names, self.sensors, self.source,
                                   line=None if self.is_parquet else self.skip_rows + 1)
        self.raw_names = list(self.header.raw_names)
        self.time_index = self.header.time_index
        self.time_name = self.header.time_name
        seen = {self.sensors[j] for _, j in self.header.columns}
        self.missing_sensors = [s for s in self.sensors if s not in seen]
        self.columns = list(self.header.columns)
        self.warnings = list(self.dialect.notes)
        self.times = TimeReader(self.source, self.warnings, time_format, decimal=self.decimal)
        self._parsers = {}

    @property
    def time_kind(self):
        """``"number"`` or ``"datetime"``, fixed by the first parseable time (None before)."""
        return self.times.time_kind

    def signature(self):
        """Return the resume signature: path, size and modification time of the file.

        A resumed run also compares every chunk's content hash (``Chunk.digest``).
        """
        return self.table.signature() if self.table is not None else log_signature(self.path)

    def _names(self):
        if self.table is not None:
            return list(self.table.names)
        if self.is_parquet:
            import pyarrow.parquet as pq

            try:
                return pq.ParquetFile(self.path).schema_arrow.names
            except Exception as exc:  # noqa: BLE001 - any read failure is bad input
                raise InputError(self.source, f"cannot be read as Parquet ({exc})") from None
        # leading lines starting with '#' are comments (e.g. a SYNTHETIC label)
        self.skip_rows = 0
        with open(self.path, encoding=_text_encoding(self.dialect), errors="replace") as fh:
            first = fh.readline()
            while first.lstrip().startswith("#"):
                self.skip_rows += 1
                first = fh.readline()
        if not first.strip():
            raise InputError(self.source, "the file is empty (no header)")
        import csv

        return next(csv.reader([first], delimiter=self.sep))

    # --- raw batches ---------------------------------------------------------------------------
    def _batches(self):
        """Yield ``(segments, digest)`` piece by piece.

        ``segments``: ``[(table, malformed rows, number of records, header)]``, one per run of
        lines under one header (several when the header line repeats inside the piece);
        ``digest``: blake2b of the bytes the piece was read from.
        """
        if self.is_parquet:
            import pyarrow.parquet as pq

            batches = (self.table.batches(self.chunk_rows) if self.table is not None
                       else pq.ParquetFile(self.path).iter_batches(batch_size=self.chunk_rows))
            for b in batches:
                yield [(b, [], None, self.header)], _batch_digest(b)
            return
        state = {"header": self.header}
        for pos, piece, lines in self._pieces():
            digest = hashlib.blake2b(piece, digest_size=20).hexdigest()
            yield self._piece_segments(pos, piece, lines, state), digest

    def _parser(self, header):
        """``(parse_piece, unquoted, bad)`` for ``header`` (made once per header)."""
        key = header.raw_names
        if key not in self._parsers:
            bad = []
            self._parsers[key] = (*self._csv_parser(bad, header), bad)
        return self._parsers[key]

    def _piece_segments(self, pos, piece, lines, state):
        """Parse one piece under the header in effect, re-mapping at repeated header lines.

        The first conversion is tried on the whole piece; only when it fails, or rows do not
        fit the header, is the piece searched for header lines (:func:`~invert.io.header.
        header_lines`), so a clean log pays nothing for it.
        """
        h = state["header"]
        parse_piece, unquoted, bad = self._parser(h)
        table = parse_piece(piece, first_only=True)
        if table is None or bad:
            raw = bytes(piece)
            found = header_lines(raw, self._header_re(), sep=self.sep)
            if found:
                return self._split_at_headers(raw, lines.before(pos), found, state)
        if table is None:
            table = parse_piece(piece, skip_first=True)
        return [self._segment(table, piece, lines.before(pos) if bad else 0, h)]

    def _segment(self, table, piece, line0, h):
        """One segment's ``(table, malformed, n_records, header)`` (malformed rows placed)."""
        parse_piece, unquoted, bad = self._parser(h)
        got, n_rec = [], None
        if bad:
            table, got, n_rec = self._place_malformed(table, piece, line0, bad, parse_piece,
                                                      unquoted, len(h.raw_names))
        bad.clear()
        return table, got, n_rec, h

    def _split_at_headers(self, raw, line0, found, state):
        """Segments of a piece holding header lines (each line itself is not a record)."""
        segments, start, first_line = [], 0, 0
        for idx, a, b, cells in found:
            segments.append((raw[start:a], line0 + first_line, state["header"]))
            line = line0 + idx + 1
            new = parse_header(cells, self.sensors, self.source, line=line)
            old = state["header"]
            what = ("with the same columns" if new.same_mapping(old) else
                    "with the columns in another order; the columns were re-mapped and the "
                    "frames after it read with the new order")
            note = f"{self.source}: the header line repeats at line {line} {what}"
            if note not in self.warnings:
                self.warnings.append(note)
            state["header"] = new
            start, first_line = b, idx + 1
        segments.append((raw[start:], line0 + first_line, state["header"]))
        out = []
        for part, l0, h in segments:
            if not _NONBLANK.search(part):
                continue
            parse_piece, _, _ = self._parser(h)
            out.append(self._segment(parse_piece(part), part, l0, h))
        return out

    def _header_re(self):
        if getattr(self, "_hre", None) is None:
            self._hre = header_pattern(self.raw_names, self.sensors, sep=self.sep)
        return self._hre

    def _csv_parser(self, bad, header):
        """``(parse_piece, unquoted)``: a piece parser that appends malformed rows to ``bad``."""
        import pyarrow as pa
        import pyarrow.csv as pcsv

        def on_invalid(row):
            bad.append((row.number, row.text))
            return "skip"

        names = list(header.raw_names)
        opts = pcsv.ReadOptions(column_names=names, use_threads=True,
                                block_size=1 << 20, encoding=self.dialect.encoding)
        parse = pcsv.ParseOptions(invalid_row_handler=on_invalid, delimiter=self.sep)
        # Without quoting: a stray quote in a cell would otherwise run on over the following
        # lines and swallow them into one field (used only when the rows do not add up).
        unquoted = pcsv.ParseOptions(invalid_row_handler=on_invalid, quote_char=False,
                                     delimiter=self.sep)

        def convert(time_type, sensor_type):
            types = {n: (time_type if i == header.time_index else sensor_type)
                     for i, n in enumerate(names)}
            return pcsv.ConvertOptions(column_types=types, strings_can_be_null=True,
                                       null_values=NULLS, quoted_strings_can_be_null=True,
                                       decimal_point=self.decimal)

        # Fast path: every column float64 (numeric times). After a failure, the time column as
        # text (numbers or date-times) with float64 sensors, then everything as text (the
        # cell-by-cell fallback of _convert finds the bad cells). Date-time logs skip the first.
        numeric = convert(pa.float64(), pa.float64())
        typed, text = convert(pa.string(), pa.float64()), convert(pa.string(), pa.string())

        def parse_piece(piece, parse=parse, first_only=False, skip_first=False):
            tries = (typed, text) if self.times.time_kind == "datetime" else (numeric, typed, text)
            for conv in tries[:1] if first_only else tries[1:] if skip_first else tries:
                bad.clear()
                try:
                    return pcsv.read_csv(pa.py_buffer(piece), read_options=opts,
                                         parse_options=parse, convert_options=conv)
                except pa.ArrowInvalid as exc:
                    if conv is text:
                        raise InputError(self.source, f"cannot be read as CSV ({exc})") from None
            return None  # the first conversion failed (first_only)

        return parse_piece, unquoted

    def _pieces(self):
        """Yield ``(file offset, piece, line counter)`` for the non-blank pieces of the file.

        The file is cut into pieces of about ``chunk_rows`` lines at line ends here and each
        piece parsed on its own (pyarrow.csv.read_csv on the piece, all threads): the
        streaming reader read ahead of a slow consumer, so its memory grew with the length of
        the log. A record must therefore not contain a quoted line break (logs of numbers
        never do).
        """
        # ~ bytes per row from the first lines, so that a piece holds about chunk_rows rows
        with open(self.path, "rb") as fh:
            head = fh.read(1 << 16)
        lines = max(head.count(b"\n"), 1)
        block = int(min(max(len(head) / lines * self.chunk_rows, 1 << 12), 1 << 30))
        with open(self.path, "rb") as fh:
            for _ in range(self.skip_rows + 1):  # comments and the header
                fh.readline()
            lines = LineCounter(self.path, fh.tell(), self.skip_rows + 1)
            pos = fh.tell()  # file offset of the current piece
            while True:
                data = fh.read(block)
                if not data:
                    return
                if len(data) == block:  # not at the end: the piece stops at the last line end
                    cut = data.rfind(b"\n") + 1
                    if cut == 0:  # a line longer than the block
                        block *= 2
                        fh.seek(pos)
                        continue
                    fh.seek(pos + cut)
                else:
                    cut = len(data)
                if _NONBLANK.search(data, 0, cut):
                    # a view, not a copy: the piece is handed to pyarrow as it is
                    yield pos, memoryview(data)[:cut], lines
                pos += cut

    def _place_malformed(self, table, piece, line0, bad, parse_piece, unquoted, width):
        """Malformed rows (rare): their line numbers and places among the piece's records.

        Found by reading the piece line by line (``line0``: lines before the piece, counted
        only when there is such a row). When the rows do not add up the piece is parsed again
        without quoting; should they still disagree, pyarrow's rows are kept without places
        (they go to the end of the chunk). Returns ``(table, malformed, n_records)``.
        """
        raw = bytes(piece)
        got, n_rec = self._locate_malformed(raw, line0, width)
        if not self._adds_up(table, got, bad, n_rec):
            table = parse_piece(piece, unquoted)
            got, n_rec = self._locate_malformed(raw, line0, width, quoted=False)
        if not self._adds_up(table, got, bad, n_rec):
            got = [(line0 + num if num is not None and num > 0 else None, txt, None)
                   for num, txt in bad]
            n_rec = None
        return table, got, n_rec

    def __iter__(self):
        start = 0
        for segments, digest in self._batches():
            parts = []
            for seg in segments:
                ch, n = self._segment_chunk(seg, start)
                start += n
                if ch is not None:
                    parts.append(ch)
            if parts:
                ch = parts[0] if len(parts) == 1 else _concat(*parts)
                ch.digest = digest
                yield ch

    def _segment_chunk(self, segment, start):
        """Return one segment's chunk (records numbered from ``start``) and record count."""
        batch, malformed, n_rec, h = segment
        ch = self._convert(batch, start, h) if batch is not None and batch.num_rows else None
        if not malformed:
            return ch, 0 if ch is None else len(ch)
        extra = self._malformed(malformed, h)
        if n_rec is None:  # places unknown: at the end of the chunk, frame -1
            return (extra if ch is None else _concat(ch, extra)), 0 if ch is None else len(ch)
        # every record in log order, numbered by its place in the log
        at = np.array([r for _, _, r in malformed], np.int64)
        good = np.setdiff1d(np.arange(n_rec), at)
        extra.frame[:] = start + at
        if ch is not None:
            ch.frame[:] = start + good
            extra = _concat(ch, extra)
        order = np.argsort(extra.frame, kind="stable")
        return Chunk(extra.frame[order], extra.t[order], extra.Y[order],
                     extra.reason[order]), n_rec

    @staticmethod
    def _adds_up(table, located, reported, n_rec):
        """Whether pyarrow's rows and malformed rows are the records read line by line."""
        return len(located) == len(reported) and table is not None and \
            table.num_rows == n_rec - len(located)

    def _locate_malformed(self, piece, line0, width, quoted=True):
        """Find the rows of ``piece`` whose number of cells differs from the header's.

        Returns ``([(line number, text, place among the piece's records)], number of
        records)``.

        A record is a non-empty line (pyarrow skips empty ones; records never hold a quoted
        line break, see :meth:`_batches`); cells are split by the csv module, quotes honoured,
        or at every comma when ``quoted`` is False.
        """
        import csv

        out, rec = [], 0
        for i, raw in enumerate(piece.split(b"\n")):
            line = raw.rstrip(b"\r")
            if not line:
                continue
            text = line.decode("utf-8", errors="replace")
            cells = next(csv.reader([text], delimiter=self.sep)) if quoted else \
                text.split(self.sep)
            if len(cells) != width:
                out.append((line0 + i + 1, text, rec))
            rec += 1
        return out, rec

    # --- conversion -----------------------------------------------------------------------------
    def _malformed(self, rows, h):
        n = len(rows)
        reason = np.array(["malformed row (wrong number of cells)"
                           + (f" at line {num}" if num is not None and num >= 0 else "")
                           for num, _, _ in rows], dtype=object)
        cells = []
        for _, text, _ in rows:
            parts = (text or "").split(self.sep)
            cells.append(parts[h.time_index].strip() if h.time_index < len(parts) else "")
        t = self.times.cells(np.array(cells, dtype=object))[0]
        return Chunk(np.full(n, -1, np.int64), t, np.full((n, len(self.sensors)), np.nan), reason)

    def _convert(self, batch, start, h):
        import pyarrow as pa
        import pyarrow.compute as pc

        L = batch.num_rows
        Y = np.full((L, len(self.sensors)), np.nan)
        reason = np.full(L, None, dtype=object)
        for name, j in h.columns:
            col = batch.column(name)
            if pa.types.is_floating(col.type) or pa.types.is_integer(col.type):
                vals = float_values(col.cast(pa.float64()))
                bad = np.zeros(L, bool)
            else:
                if not pa.types.is_string(col.type):
                    col = col.cast(pa.string())
                try:
                    vals = pc.cast(col, pa.float64()).to_numpy(zero_copy_only=False)
                    bad = np.zeros(L, bool)
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                    vals, bad = parse_cells(col, self.decimal)
            vals = np.asarray(vals, float)
            nonfinite = np.isinf(vals)
            if bad.any() or nonfinite.any():
                text = col.to_pylist() if bad.any() or nonfinite.any() else None
                for i in np.flatnonzero(bad | nonfinite):
                    if reason[i] is None:
                        what = "non-numeric" if bad[i] else "non-finite"
                        reason[i] = f"{what} cell in column '{name.strip()}': {text[i]!r}"
                vals = np.where(bad | nonfinite, np.nan, vals)
            Y[:, j] = vals
        tcol = batch.column(h.time_name)
        t, tbad = self.times.column(tcol)
        if tbad.any():
            text = tcol.to_pylist()
            for i in np.flatnonzero(tbad):
                if reason[i] is None:
                    reason[i] = (f"unparseable time {str(text[i]).strip()!r}" if tbad[i] == 1
                                 else "missing time")
        return Chunk(np.arange(start, start + L, dtype=np.int64), t, Y, reason)

def _text_encoding(dialect):
    """Python codec name for reading the header line (a UTF-8 BOM dropped)."""
    return "utf-8-sig" if dialect.encoding == "utf-8" else dialect.encoding


def _concat(*parts):
    return Chunk(np.concatenate([c.frame for c in parts]), concat_times([c.t for c in parts]),
                 np.vstack([c.Y for c in parts]), np.concatenate([c.reason for c in parts]))


def _batch_digest(batch):
    """blake2b of a record batch's Arrow buffers (what a Parquet chunk was read into)."""
    h = hashlib.blake2b(digest_size=20)
    for col in batch.columns:
        for buf in col.buffers():
            if buf is not None:
                h.update(buf)
    return h.hexdigest()


