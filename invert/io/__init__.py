"""Input and output of tables: snapshot readings, layouts, query points and logged data.

``readings`` loads snapshot tables; ``sources`` defines the :class:`LogSource` protocol of
logged data, ``wide`` its first implementation (wide CSV/Parquet logs) and ``logs.open_log``
chooses the source for a log; ``arrow`` converts columns through Arrow buffers and ``writers``
writes outputs atomically.
"""

from .readings import Readings, load_layout, load_points, load_readings

__all__ = ["Readings", "load_layout", "load_points", "load_readings"]
