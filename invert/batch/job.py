"""A batch job: a frozen description of the run, and the generator that does its chunks.

:class:`BatchJob` holds everything a run needs (the domain and the sensors, the query points,
the parameters, the output settings and the algorithm); :func:`job_chunks` runs it over a
:class:`~invert.io.sources.LogSource` on an :class:`~invert.batch.engines.Engine`, yielding
after every chunk committed to the working folder, so that a caller can show progress,
checkpoint, or stop (the working folder then holds a resumable run).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .._validation import check_level
from .calibration import hyperparameters
from .checkpoint import CheckedLog
from .static import static_chunks

__all__ = ["BatchJob", "job_chunks", "FORMATS"]

#: Output formats (``netcdf``: Parquet tables and results.nc).
FORMATS = ("parquet", "csv", "netcdf")


@dataclass(frozen=True, eq=False)
class BatchJob:
    """Everything a batch run needs, fixed before it starts.

    Parameters
    ----------
    domain : Domain
    sensors : ndarray of str, shape (n_sensors,)
        Sensor ids of the layout, in layout order.
    points : ndarray of shape (n_sensors, dim)
    sigma : ndarray of shape (n_sensors,) or None
        Per-sensor noise sd, or None (a common level ``noise_sd``, given or estimated).
    query_points : ndarray of shape (n_query, dim)
    query_labels : ndarray of str, shape (n_query,)
    out : Path
        Output folder.
    fmt : {"parquet", "csv"}, default="parquet"
    chunk_rows : int, default=65536
    resume : bool, default=False
    level : float, default=0.9
    s : float, default=2.0
        Smoothness order of the prior.
    lam, noise_sd : float, optional
        Fixed parameters; estimated on the log (pooled evidence) when ``lam`` is None.
    calibration_frames : int, default=2000
        Frames of the pooled-evidence estimate.
    assimilate : bool, default=False
        Kalman filter + RTS smoother instead of per-frame fits.
    time_scale : float, optional
        Fixed time scale of the dynamics; else maximum likelihood on ``ml_frames`` frames.
    ml_frames : int, default=20000
    steady_tol : float, default=1e-10
    max_transient : int or None, default=None
        None: the exact compiled filter and smoother at every frame; an integer: the
        steady-state shortcut after that many exact frames.
    parallel_in_time : bool, default=False
        Assimilation by the parallel-in-time algorithm (exact mode only:
        ``max_transient=None``).
    handover_tol : float, default=1e-10
        Exact mode on an engine with several workers: chunks start from warm-up states, kept
        when they match the true neighbour state within this many sds (and relative for
        covariances), else run again (:mod:`invert.batch.overlap`).
    warmup : int, optional
        Warm-up length in frames of those starts; default from the time scale.
    unit : str, optional
        Unit of the readings (results.nc).
    time_format : str, optional
        How the log writes its times (:mod:`invert.io.times`); None: numbers or ISO 8601.
    layout_digest, query_digest : str, optional
        Content hashes of the input files (part of the resume signature).
    sensor_health : bool, default=False
        Assimilation with per-sensor offsets and faulty readings down-weighted
        (:mod:`invert.batch.health_chain`; the exact kernel only).
    offset_sd, offset_rate : float, optional
        Prior sd of an offset and sd of its change over one time scale (readings' units);
        default 10 and 1 median noise sds (:mod:`invert.stages.assimilate.health`).
    health_block : str, default="1000"
        Blocks of the sensors table: a record count or a duration (``30min``, ``2h``).
    trusted : ndarray of bool, shape (n_sensors,), optional
        Sensors marked trusted in the layout (no offset; the reference of the others).
    """

    domain: object
    sensors: np.ndarray
    points: np.ndarray
    sigma: np.ndarray | None
    query_points: np.ndarray
    query_labels: np.ndarray
    out: Path
    fmt: str = "parquet"
    chunk_rows: int = 65536
    resume: bool = False
    level: float = 0.9
    s: float = 2.0
    lam: float | None = None
    noise_sd: float | None = None
    calibration_frames: int = 2000
    assimilate: bool = False
    time_scale: float | None = None
    ml_frames: int = 20000
    steady_tol: float = 1e-10
    max_transient: int | None = None
    parallel_in_time: bool = False
    handover_tol: float = 1e-10
    warmup: int | None = None
    time_format: str | None = None
    unit: str | None = None
    layout_digest: str | None = None
    query_digest: str | None = None
    sensor_health: bool = False
    offset_sd: float | None = None
    offset_rate: float | None = None
    health_block: str = "1000"
    trusted: np.ndarray | None = None

    def __post_init__(self):
        object.__setattr__(self, "level", check_level(self.level, where="batch"))
        object.__setattr__(self, "out", Path(self.out))
        if self.fmt not in FORMATS:
            raise ValueError(f"The 'format' parameter of batch must be one of {FORMATS}. "
                             f"Got {self.fmt!r} instead.")
        if self.noise_sd is not None and self.lam is None:
            raise ValueError("--noise-sd goes with --lam (both fixed, e.g. from a fit summary)")
        if self.lam is not None and self.sigma is None and self.noise_sd is None:
            raise ValueError("--lam needs --noise-sd when the layout has no 'sigma' column")
        if not (np.isfinite(self.handover_tol) and 0 < self.handover_tol < 1):
            raise ValueError(f"The 'handover_tol' parameter of batch must be a float in the "
                             f"range (0, 1). Got {self.handover_tol!r} instead.")
        if self.warmup is not None and not (isinstance(self.warmup, (int, np.integer))
                                            and self.warmup >= 1):
            raise ValueError(f"The 'warmup' parameter of batch must be an int >= 1 or None. "
                             f"Got {self.warmup!r} instead.")
        if self.parallel_in_time and not self.assimilate:
            object.__setattr__(self, "parallel_in_time", False)
        if self.sensor_health and not (self.assimilate and self.max_transient is None
                                       and not self.parallel_in_time):
            raise ValueError("--sensor-health needs --assimilate with the exact filter "
                             "(--max-transient 0, not parallel in time)")
        if self.sensor_health:
            from .health_chain import parse_block

            parse_block(self.health_block)
        if self.parallel_in_time and self.max_transient is not None:
            raise ValueError("The parallel-in-time smoother is exact: it needs "
                             f"max_transient=None. Got {self.max_transient!r} instead.")

    @property
    def table_fmt(self):
        """Format of the frames and query tables: ``csv`` or ``parquet``."""
        return "csv" if self.fmt == "csv" else "parquet"

    def options(self):
        """Return the settings a resumed run must share (JSON-serialisable)."""
        dom = self.domain
        shape = {k: getattr(dom, k) for k in getattr(dom, "shape_parameters", ())}
        health = ({"health": {"offset_sd": self.offset_sd, "offset_rate": self.offset_rate,
                              "block": self.health_block}} if self.sensor_health else {})
        return {
            **({"shape": shape} if shape else {}),
            "layout": self.layout_digest, "query": self.query_digest,
            "radius": dom.radius, "center": list(dom.center), "n_modes": dom.n_modes,
            "s": self.s, "lam": self.lam, "noise_sd": self.noise_sd,
            "assimilate": bool(self.assimilate), "time_scale": self.time_scale,
            "fmt": self.fmt, "chunk_rows": self.chunk_rows, "level": self.level,
            "steady_tol": self.steady_tol, "max_transient": self.max_transient,
            "parallel_in_time": bool(self.parallel_in_time), "parts": "arrow-ipc",
            "handover_tol": self.handover_tol, "warmup": self.warmup,
            "time_format": self.time_format,
            "state": "npz", **health,
        }


def job_chunks(job, source, engine, work):
    """Run ``job``: yield after each chunk is committed; return the summary entries.

    Parameters
    ----------
    job : BatchJob
    source : LogSource
        Read through :class:`~invert.batch.checkpoint.CheckedLog`: every chunk's content
        hash is recorded in the manifest, and compared whenever the chunk is read again
        (later in this run, or by a resumed run).
    engine : Engine
    work : WorkFolder
        The run's working folder (fresh, or an interrupted run's to resume).

    Yields
    ------
    ChunkDone

    Returns
    -------
    hyper : dict
        ``lam``, ``noise_sd``, ``how`` (and the time scale in assimilation).
    extra : dict
        Summary entries of the mode.
    """
    source = CheckedLog(source, work)
    hyper = hyperparameters(job, source, work.manifest)
    work.manifest["hyper"] = hyper
    work.save()
    if job.assimilate:
        # imported here: the static job (and the CLI's start) need not load the filter
        from .assimilation import assimilation_chunks

        extra = yield from assimilation_chunks(job, source, engine, work, hyper)
    else:
        extra = yield from static_chunks(job, source, engine, work, hyper)
    return hyper, extra
