"""Input and output of tables: snapshot readings, layouts, query points and logged data.

``readings`` loads snapshot tables; ``sources`` defines the :class:`LogSource` protocol of
logged data, ``wide`` its first implementation (wide CSV/Parquet logs) and ``logs.open_log``
chooses the source for a log (``header`` checks and re-maps a wide log's columns, ``cells``
parses cells one by one); ``arrow`` converts columns through Arrow buffers, ``writers``
writes files atomically and ``publish`` locks an output folder and swaps a complete output set
into it at once.
"""

from .readings import Readings, load_layout, load_points, load_readings

__all__ = ["Readings", "load_layout", "load_points", "load_readings"]
