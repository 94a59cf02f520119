"""Opening a log: which :class:`~invert.io.sources.LogSource` reads which log."""

from __future__ import annotations

from .sources import LogSource
from .wide import WideLogReader

__all__ = ["open_log"]


def open_log(path, sensors, *, chunk_rows=65536, **options) -> LogSource:
    """Open the log at ``path`` as a :class:`~invert.io.sources.LogSource`.

    Today every log is a wide CSV or Parquet file (:class:`~invert.io.wide.WideLogReader`);
    a new kind of log (long format, a database table) is chosen here.

    Parameters
    ----------
    path : str or Path
    sensors : sequence of str
        Sensor ids of the layout, in layout order.
    chunk_rows : int, default=65536
        Frames per chunk, about.
    **options
        Passed to the source (a CSV log: ``sep``, ``decimal``; None detects them).

    Returns
    -------
    LogSource
    """
    return WideLogReader(path, sensors, chunk_rows=chunk_rows, **options)
