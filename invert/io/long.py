"""Long ("tidy") logs: one row per time, sensor and value, with an optional quality flag.

A log whose columns are exactly ``time, sensor, value`` or ``time, sensor, value, flag``
(names in any case, in any order; ``quality`` is taken for ``flag``) is long. Rows of one time
form one frame; they may come in any order, but the rows of one time come together (loggers
and historians export by time). A time that comes back after other times is a frame of its
own, which the job rejects as a duplicate time: its readings are never merged silently.

Per row:

* a sensor that is not in the layout: the row is left out, and the warnings name the sensor and
  its number of rows;
* a value that is not a number: the frame is rejected, the reason names the sensor and the
  text (as for a bad cell of a wide log); a blank value is a missing reading;
* two values for one sensor at one time: the frame is rejected with the sensor named;
* an unparseable time: the row is a rejected frame of its own, its text in the reason;
* ``flag``: blank, ``0``, ``good``, ``ok``, ``g`` or ``192`` (case-insensitive) mark a good
  reading; any other flag makes the reading missing, and the warnings give the count. (192 is
  the OPC DA "good" quality code, from memory; common practice for historian exports.)

Memory stays bounded: the file is read in record batches (``pyarrow.csv.open_csv`` or
``ParquetFile.iter_batches``); the rows of the last time of a batch wait for the next batch,
so a time straddling a batch boundary is one frame.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from ..errors import InputError
from .arrow import string_codes
from .cells import parse_cells
from .sources import Chunk, concat_times
from .times import TimeReader

__all__ = ["LongLogReader", "is_long", "GOOD_FLAGS"]

#: Flag values of a good reading (lower case, stripped).
GOOD_FLAGS = ("", "0", "good", "ok", "g", "192")

_ROLES = {"time": "time", "sensor": "sensor", "value": "value", "flag": "flag",
          "quality": "flag"}


def _roles(names):
    roles = {}
    for name in names:
        role = _ROLES.get(str(name).strip().lower())
        if role is None or role in roles:
            return None
        roles[role] = name
    return roles if {"time", "sensor", "value"} <= set(roles) else None


def is_long(names):
    """Return whether a header is a long log's (time, sensor, value[, flag])."""
    return _roles(names) is not None


class LongLogReader:
    """A long CSV or Parquet log as a :class:`~invert.io.sources.LogSource`.

    Parameters
    ----------
    path : str or Path
    sensors : sequence of str
        Sensor ids of the layout.
    names : list of str
        The header (from :func:`invert.io.logs.open_log`).
    chunk_rows : int, default=65536
        Frames per chunk, about.
    time_format : str, optional
        As for :class:`~invert.io.wide.WideLogReader`.
    skip_rows : int, default=0
        Comment lines before the header of a CSV file.
    """

    def __init__(self, path, sensors, names, *, chunk_rows=65536, time_format=None,
                 skip_rows=0, table=None):
        self.table = table
        self.path = None if table is not None else Path(path)
        self.source = table.source if table is not None else self.path.name
        self.sensors = [str(s) for s in sensors]
        self.chunk_rows = int(chunk_rows)
        self.is_parquet = table is None and self.path.suffix.lower() in (".parquet", ".pq")
        self.skip_rows = int(skip_rows)
        self.roles = _roles(names)
        if self.roles is None:
            raise InputError(self.source, "not a long log (columns time, sensor, value[, flag])")
        self.columns = [(s, j) for j, s in enumerate(self.sensors)]
        self.missing_sensors = []
        self.warnings = []
        self.times = TimeReader(self.source, self.warnings, time_format)

    @property
    def time_kind(self):
        """``"number"`` or ``"datetime"``, fixed by the first parseable time (None before)."""
        return self.times.time_kind

    def signature(self):
        """Return the resume signature: path, size and modification time of the file."""
        from .wide import log_signature

        return self.table.signature() if self.table is not None else log_signature(self.path)

    # --- reading --------------------------------------------------------------------------------
    def _record_batches(self):
        import pyarrow as pa

        rows = max(self.chunk_rows * max(len(self.sensors), 1), 1024)
        if self.table is not None:
            yield from self.table.batches(rows)
            return
        if self.is_parquet:
            import pyarrow.parquet as pq

            pf = pq.ParquetFile(self.path)
            yield from pf.iter_batches(batch_size=rows, columns=list(self.roles.values()))
            return
        import pyarrow.csv as pcsv

        types = {self.roles[r]: pa.string() for r in self.roles}
        reader = pcsv.open_csv(
            self.path,
            read_options=pcsv.ReadOptions(skip_rows=self.skip_rows,
                                          block_size=int(min(max(rows * 40, 1 << 16), 1 << 26))),
            convert_options=pcsv.ConvertOptions(column_types=types, strings_can_be_null=True))
        yield from reader

    def __iter__(self):
        self._unknown, self._flagged, seen = {}, 0, set()
        start, pending, n_frames, parts = 0, None, 0, []
        for batch in self._record_batches():
            piece = self._rows(batch)
            if pending is not None:
                piece = _join(pending, piece)
            piece, pending = _hold_last_time(piece)
            parts.append(piece)
            n_frames += piece["n_frames"]
            if n_frames >= self.chunk_rows:
                chunk = self._frames(_join(*parts), start, seen)
                start += len(chunk)
                yield chunk
                parts, n_frames = [], 0
        if pending is not None:
            parts.append(pending)
        if parts and sum(p["n_rows"] for p in parts):
            yield self._frames(_join(*parts), start, seen)
        self._finish(seen)

    def _finish(self, seen):
        for name, count in self._unknown.items():
            note = (f"{self.source}: {count} row(s) for sensor {name!r}, which is not in the "
                    f"layout, were left out")
            if note not in self.warnings:
                self.warnings.append(note)
        if self._flagged:
            note = (f"{self.source}: {self._flagged} reading(s) flagged as not good were "
                    f"treated as missing (good flags: blank, 0, good, ok, g, 192)")
            if note not in self.warnings:
                self.warnings.append(note)
        self.missing_sensors = [s for s in self.sensors if s not in seen]

    def _rows(self, batch):
        """Parse one record batch: times, sensor indices, values, row reasons."""
        import pyarrow as pa
        import pyarrow.compute as pc

        n = batch.num_rows
        tcol = batch.column(self.roles["time"])
        if pa.types.is_string(tcol.type) and self.times.fmt is None:
            for ty in (pa.timestamp("ns"), pa.timestamp("ns", "UTC")):
                try:
                    tcol = pc.cast(tcol, ty)
                    break
                except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                    continue
        t, tbad = self.times.column(tcol)
        scol = pc.utf8_trim_whitespace(batch.column(self.roles["sensor"]).cast(pa.string()))
        idx = string_codes(scol, self.sensors)
        vcol = batch.column(self.roles["value"])
        if pa.types.is_floating(vcol.type) or pa.types.is_integer(vcol.type):
            v = np.asarray(vcol.cast(pa.float64()).to_numpy(zero_copy_only=False), float)
            vbad = np.zeros(n, bool)
        else:
            try:
                v = np.asarray(pc.cast(vcol, pa.float64()).to_numpy(zero_copy_only=False), float)
                vbad = np.zeros(n, bool)
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                v, vbad = parse_cells(vcol.cast(pa.string()))
                v = np.asarray(v, float)
        vbad |= np.isinf(v)
        if "flag" in self.roles:
            flags = pc.utf8_lower(pc.utf8_trim_whitespace(
                batch.column(self.roles["flag"]).cast(pa.string()))).fill_null("")
            good = pc.is_in(flags, value_set=pa.array(GOOD_FLAGS, pa.string()))
            bad_flag = ~np.asarray(good.to_numpy(zero_copy_only=False), bool)
            self._flagged += int((bad_flag & np.isfinite(v)).sum())
            v = np.where(bad_flag, np.nan, v)
        reason = np.full(n, None, dtype=object)
        if vbad.any():  # the texts of the few bad rows, cast once
            vtext = vcol.cast(pa.string())
            for i in np.flatnonzero(vbad):
                reason[i] = (f"non-numeric value for sensor {scol[int(i)].as_py()!r}: "
                             f"{vtext[int(i)].as_py()!r}")
        if (tbad == 1).any():
            ttext = tcol.cast(pa.string())
            for i in np.flatnonzero(tbad == 1):
                reason[i] = f"unparseable time {str(ttext[int(i)].as_py()).strip()!r}"
        for i in np.flatnonzero(tbad == 2):
            reason[i] = "missing time"
        unknown = idx < 0
        if unknown.any():
            for name in scol.filter(pa.array(unknown)).to_pylist():
                key = "" if name is None else name
                self._unknown[key] = self._unknown.get(key, 0) + 1
        keep = ~unknown | (tbad > 0)
        return _piece(t[keep], idx[keep], np.where(vbad, np.nan, v)[keep], reason[keep],
                      tbad[keep] > 0)

    def _frames(self, piece, start, seen):
        """Pivot a piece's rows (whole times only) into a chunk of frames."""
        t, idx, v, reason, tbad = (piece[k] for k in ("t", "idx", "v", "reason", "tbad"))
        group = _groups(t, tbad)
        n = int(group[-1]) + 1 if len(group) else 0
        Y = np.full((n, len(self.sensors)), np.nan)
        freason = np.full(n, None, dtype=object)
        ok = idx >= 0
        cell = group[ok] * len(self.sensors) + idx[ok]
        uniq, counts = np.unique(cell, return_counts=True)
        for c in uniq[counts > 1]:
            g, j = divmod(int(c), len(self.sensors))
            freason[g] = f"two values for sensor {self.sensors[j]!r} at this time"
        Y.reshape(-1)[cell] = v[ok]
        seen.update(self.sensors[j] for j in np.unique(idx[ok]))
        for i in np.flatnonzero(np.not_equal(reason, None)):
            if freason[group[i]] is None:
                freason[group[i]] = reason[i]
        first = np.r_[0, np.flatnonzero(np.diff(group)) + 1] if n else np.zeros(0, np.int64)
        times = t[first]
        h = hashlib.blake2b(digest_size=20)
        for a in (t, idx, v):
            h.update(np.ascontiguousarray(a).tobytes())
        return Chunk(np.arange(start, start + n, dtype=np.int64), times, Y, freason,
                     h.hexdigest())


def _piece(t, idx, v, reason, tbad):
    g = _groups(t, tbad)
    return {"t": t, "idx": idx, "v": v, "reason": reason, "tbad": tbad, "n_rows": len(t),
            "n_frames": int(g[-1]) + 1 if len(g) else 0}


def _groups(t, tbad):
    """Frame number of each row: a new frame wherever the time changes (bad times alone)."""
    if len(t) == 0:
        return np.zeros(0, np.int64)
    new = np.empty(len(t), bool)
    new[0] = True
    new[1:] = (t[1:] != t[:-1]) | tbad[1:] | tbad[:-1]
    return np.cumsum(new) - 1


def _join(*pieces):
    pieces = [p for p in pieces if p["n_rows"]]
    if not pieces:
        return _piece(np.zeros(0), np.zeros(0, np.int64), np.zeros(0),
                      np.zeros(0, object), np.zeros(0, bool))
    return _piece(concat_times([p["t"] for p in pieces]), *(np.concatenate([p[k] for p in pieces])
                                        for k in ("idx", "v", "reason", "tbad")))


def _hold_last_time(piece):
    """Split off the rows of the piece's last time (they may go on in the next batch)."""
    n = piece["n_rows"]
    if n == 0:
        return piece, None
    g = _groups(piece["t"], piece["tbad"])
    cut = int(np.searchsorted(g, g[-1]))
    take = {k: piece[k][:cut] for k in ("t", "idx", "v", "reason", "tbad")}
    rest = {k: piece[k][cut:] for k in ("t", "idx", "v", "reason", "tbad")}
    return _piece(**take), _piece(**rest)
