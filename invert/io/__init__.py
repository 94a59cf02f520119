"""Input and output of tables: snapshot readings, layouts, query points and logged data."""

from .readings import Readings, load_layout, load_points, load_readings

__all__ = ["Readings", "load_layout", "load_points", "load_readings"]
