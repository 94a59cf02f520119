"""Batch reanalysis of logged data: static per-frame fits and assimilation over time."""

from .runner import run_batch

__all__ = ["run_batch"]
