"""Opening a log: which :class:`~invert.io.sources.LogSource` reads which log."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError
from .long import LongLogReader, is_long
from .sources import LogSource
from .sql import SqlTable, is_database_url
from .wide import WideLogReader

__all__ = ["open_log"]


def open_log(path, sensors, *, chunk_rows=65536, time_format=None, table=None,
             time_from=None, time_to=None, **options) -> LogSource:
    """Open the log at ``path`` as a :class:`~invert.io.sources.LogSource`.

    A CSV or Parquet file whose columns are exactly ``time, sensor, value[, flag]`` is a long
    log (:class:`~invert.io.long.LongLogReader`); any other is wide, a time column and one
    column per sensor (:class:`~invert.io.wide.WideLogReader`). A database URL (``sqlite:///``,
    ``postgresql://``) with ``table`` reads that table, wide or long, through ADBC
    (:class:`~invert.io.sql.SqlTable`).

    Parameters
    ----------
    path : str or Path
    sensors : sequence of str
        Sensor ids of the layout, in layout order.
    chunk_rows : int, default=65536
        Frames per chunk, about.
    time_format : str, optional
        How the time cells are written, when not numbers or ISO 8601 (:mod:`invert.io.times`).
    table : str, optional
        The table, when ``path`` is a database URL.
    time_from, time_to : str, optional
        Window of a database log: ``time >= time_from`` and ``time < time_to``.
    **options
        Passed to a wide CSV log's reader (``sep``, ``decimal``; None detects them).

    Returns
    -------
    LogSource
    """
    if is_database_url(path):
        db = SqlTable(path, table, time_from=time_from, time_to=time_to)
        if is_long(db.names):
            return LongLogReader(None, sensors, db.names, chunk_rows=chunk_rows,
                                 time_format=time_format, table=db)
        return WideLogReader(None, sensors, chunk_rows=chunk_rows, time_format=time_format,
                             table=db)
    if table is not None or time_from is not None or time_to is not None:
        raise InputError(Path(path).name, "--table, --from and --to are for database logs "
                                          "(sqlite:///FILE or postgresql://...)")
    names, skip = _header(Path(path))
    if names is not None and is_long(names):
        return LongLogReader(path, sensors, names, chunk_rows=chunk_rows,
                             time_format=time_format, skip_rows=skip)
    return WideLogReader(path, sensors, chunk_rows=chunk_rows, time_format=time_format,
                         **options)


def _header(path):
    """Return the column names and the comment lines before them (None when unreadable)."""
    if not path.is_file():
        return None, 0
    if path.suffix.lower() in (".parquet", ".pq"):
        import pyarrow.parquet as pq

        try:
            return pq.ParquetFile(path).schema_arrow.names, 0
        except Exception:  # noqa: BLE001 - the wide reader names the problem
            return None, 0
    import csv

    skip = 0
    try:
        with open(path, encoding="utf-8-sig", errors="replace") as fh:
            line = fh.readline()
            while line.lstrip().startswith("#"):
                skip += 1
                line = fh.readline()
    except OSError as exc:
        raise InputError(path.name, f"cannot be read ({exc.strerror})") from None
    return (next(csv.reader([line])) if line.strip() else None), skip
