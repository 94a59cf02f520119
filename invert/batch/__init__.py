"""Batch reanalysis of logged data: static per-frame fits and assimilation over time.

Layers: :mod:`~invert.batch.job` (the frozen job and its chunk generator), over
:mod:`~invert.batch.engines` (where tasks run), :mod:`~invert.batch.static` and
:mod:`~invert.batch.assimilation` (the two modes), :mod:`~invert.batch.calibration`
(hyperparameters), :mod:`~invert.batch.checkpoint` (the resumable working folder),
:mod:`~invert.batch.statuses` and :mod:`~invert.batch.tables`; :func:`run_batch` in
:mod:`~invert.batch.runner` assembles them from file names.
"""

from .engines import DaskEngine, Engine, LocalEngine, make_engine
from .job import BatchJob, job_chunks
from .runner import run_batch, run_job

__all__ = ["run_batch", "run_job", "BatchJob", "job_chunks", "Engine", "LocalEngine",
           "DaskEngine", "make_engine"]
