r"""Reanalysis of logged frames: per-frame inversion or Kalman smoothing, resumable, local or Dask.

:func:`run_batch` reads the log in chunks (bounded memory), gives every input frame one row in
``frames.<fmt>`` (``time, frame, status, reason, n_used, centre_mean, centre_sd, chi2``) and
writes ``query.<fmt>`` (``time, label, mean, sd, lower, upper``) for the frames with an
estimate. ``frame`` is the record number in the log; ``centre_mean``/``centre_sd`` are the mean
level :math:`a_0` (the value at the centre; on an annulus coefficient 0, the outer rim's mean
level ``o_a0``); ``chi2`` is the whitened residual sum of squares of
the frame's fit (static) or its normalised innovation squared :math:`v^\top S^{-1}v`
(assimilation).

The pieces: :class:`~invert.batch.job.BatchJob` (what to do) and
:func:`~invert.batch.job.job_chunks` (doing it, chunk by chunk), run on an engine
(:mod:`invert.batch.engines`) over a log source (:mod:`invert.io.sources`); static mode in
:mod:`invert.batch.static`, assimilation in :mod:`invert.batch.assimilation`, the resumable
working folder in :mod:`invert.batch.checkpoint`, statuses in :mod:`invert.batch.statuses`.

Frame statuses: ``ok``; ``no-data`` (no reading; in assimilation the frame still gets the
smoothed estimate); ``rejected`` with a reason (duplicate time, time out of order, non-numeric or
non-finite cell, unparseable or missing time, malformed row, fewer than 2 readings in static
mode). Times must increase; a frame whose time is not after the last accepted one is rejected.

Resume: chunk outputs are written as part files with a manifest updated after each chunk; a
rerun with ``resume=True`` continues after the last completed chunk, and the merged result is
identical. The working folder holds data only (no pickle), and every chunk re-read on resume
is checked against the content hash recorded when it was first read.

The output folder (:mod:`invert.io.publish`): one run at a time holds it (a lock file; a
second run is refused with one line naming the folder and the holder's pid), and the finished
set (frames, query, summary.json) is written into a staging folder beside it and swapped in at
once, so the folder always holds either the complete old set or the complete new one.
"""

from __future__ import annotations

import hashlib
import shutil
import time as _time
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io.logs import open_log
from ..io.publish import OutputLock, check_own_folder, clean_stale_staging, publish, staging_folder
from ..io.readings import check_inside, load_layout, load_points, load_trusted
from ..io.sql import is_database_url
from ..io.writers import write_json
from ..problem import interval_z
from ..progress import progress
from ..report.batch_report import write_batch_report
from ..report.files import CAUTIONS, to_jsonable
from .calibration import pooled_evidence_fit
from .checkpoint import WorkFolder, merge_outputs
from .engines import ENGINES, make_engine
from .job import BatchJob, job_chunks
from .netcdf import write_results_nc
from .result import BatchSummary
from .static import StaticInverter
from .statuses import frame_statuses

__all__ = ["run_batch", "run_job", "job_from_files", "StaticInverter", "pooled_evidence_fit",
           "frame_statuses"]


def _digest(path):
    return None if path is None else hashlib.sha256(Path(path).read_bytes()).hexdigest()


def job_from_files(layout, query=None, *, radius, center=None, smoothness=2.0, n_modes=None,
                   kind="disk", inner_radius=None, **settings):
    """Load the layout and query points, make the domain, and describe the job.

    Parameters
    ----------
    layout : str or Path
        LAYOUT.csv: ``sensor,x,y[,sigma]``.
    query : str or Path, optional
        POINTS.csv; default the domain's reference points (the centre of a disk, label
        ``centre``; mid-wall at 0 and 180 degrees on an annulus).
    radius : float
    center : (float, float), optional
    smoothness : float, default=2.0
    n_modes : int, optional
    kind : str, default="disk"
        A name in :data:`invert.geometry.DOMAINS` (``"annulus"`` with ``inner_radius``).
    inner_radius : float, optional
        The bore of an annulus.
    **settings
        The other fields of :class:`~invert.batch.job.BatchJob` (``out`` is required).

    Returns
    -------
    BatchJob

    Raises
    ------
    InputError
        Bad layout or query file, or a point outside the disk (naming its row).
    """
    from ..workflow import make_domain

    sensors, points, sigma, rows = load_layout(layout, center=center)
    if settings.get("sensor_health"):
        settings["trusted"] = load_trusted(layout)
        if settings["trusted"] is not None and settings["trusted"].all():
            raise InputError(Path(layout).name, "every sensor is marked trusted: no offset is "
                             "left to estimate (mark the suspect sensors 0)", column="trusted")
    shape = {} if inner_radius is None else {"inner_radius": inner_radius}
    domain = make_domain(radius, center, kind=kind, s=smoothness, n_modes=n_modes, **shape)
    check_inside(domain, points, rows, Path(layout).name)
    if query is not None:
        qpts, qlabels, qrows = load_points(query)
        check_inside(domain, qpts, qrows, Path(query).name)
    else:
        ref = domain.reference_points()
        qpts = np.array([np.asarray(p, float) for _, p in ref])
        qlabels = np.array([name for name, _ in ref])
    return BatchJob(domain, sensors, points, sigma, qpts, qlabels, s=smoothness,
                    layout_digest=_digest(layout), query_digest=_digest(query), **settings)


def run_batch(log, layout, *, radius, out, query=None, assimilate=False, engine="local",
              scheduler=None, fmt="parquet", resume=False, lam=None, noise_sd=None,
              level=0.9, smoothness=2.0, n_modes=None, center=None, time_scale=None,
              chunk_rows=65536, steady_tol=1e-10, max_transient=None, calibration_frames=2000,
              ml_frames=20000, n_workers=2, parallel_in_time=False, handover_tol=1e-10,
              warmup=None, time_format=None,
              table=None, time_from=None, time_to=None, unit=None, out_table=None,
              on_chunk=None, say=print, log_options=None, kind="disk", inner_radius=None,
              sensor_health=False, offset_sd=None, offset_rate=None, health_block="1000"):
    """Reanalyse a log of frames; write frames.<fmt>, query.<fmt> and summary.json into ``out``.

    Parameters
    ----------
    log : str or Path
        CSV or Parquet log, wide (time column + one column per sensor) or long (time, sensor,
        value[, flag]); or a database URL (``sqlite:///FILE``, ``postgresql://...``) with
        ``table`` (:func:`invert.io.logs.open_log`).
    layout : str or Path
        LAYOUT.csv: ``sensor,x,y[,sigma]``.
    radius : float
    out : str or Path
    query : str or Path, optional
        POINTS.csv; default the centre of the disk (label ``centre``).
    assimilate : bool, default=False
        Kalman filter + RTS smoother instead of per-frame inversion.
    engine : {"local", "dask"}
    scheduler : str, optional
        Address of an existing dask scheduler (else an in-process LocalCluster on the
        ``inproc://`` transport is started, which no other process can reach).
    fmt : {"parquet", "csv"}
    resume : bool
        Continue an interrupted run in ``out``.
    lam, noise_sd : float, optional
        Fixed parameters (as ``rim-invert fit --lam --noise-sd``); estimated on the log when
        ``lam`` is None.
    level, smoothness, n_modes, center :
        As for ``rim-invert fit``.
    time_scale : float, optional
        Fix the time scale of the dynamics (assimilation); else maximum likelihood.
    chunk_rows : int
        Frames per chunk.
    steady_tol, max_transient :
        ``max_transient=None`` (default): the exact filter and smoother of the compiled kernel
        at every frame (:mod:`invert.batch.kernel_chain`). An integer: the NumPy recursion with
        the steady-state shortcut (:func:`~invert.stages.assimilate.filter_segment`): after
        ``max_transient`` exact steps with an unchanged drop-out pattern and time step the
        gain jumps to its steady state (tolerance ``steady_tol``).
        bench/bench_assimilate.py prints the difference.
    calibration_frames, ml_frames : int
        Frames of the pooled-evidence estimate of ``lam`` and of the time-scale estimate.
    n_workers : int, default=2
        Workers of the dask LocalCluster started when no ``scheduler`` is given.
    parallel_in_time : bool, default=False
        Assimilation by the NumPy parallel-in-time smoother (associative scan over chunk
        summaries; needs ``max_transient=None``).
    handover_tol, warmup :
        Exact mode on dask with several workers: tolerance of the checked hand-overs between
        chunks started early, and their warm-up length in frames (default from the time
        scale); :mod:`invert.batch.overlap`.
    time_format : str, optional
        How the log writes its times when not numbers or ISO 8601: ``epoch-s``/``-ms``/
        ``-us``/``-ns`` or a strptime pattern (:mod:`invert.io.times`).
    unit : str, optional
        Unit of the readings (written into results.nc).
    out_table : str, optional
        Also write the frames and query tables into tables ``<out_table>_frames`` and
        ``<out_table>_query`` of the log's database (replaced if they exist).
    table, time_from, time_to : str, optional
        The table of a database log, and its time window (``time >= time_from``,
        ``time < time_to``).
    on_chunk : callable, optional
        Called as ``on_chunk(i)`` after chunk ``i`` of a phase is committed to the working
        folder (progress, or a pause).
    say : callable, default=print
        Unused; kept for callers.
    log_options : dict, optional
        Passed to :func:`~invert.io.logs.open_log` (``sep``, ``decimal`` of a CSV log).
    kind : str, default="disk"
        Domain name (``"annulus"``: a wall, with ``inner_radius``).
    inner_radius : float, optional
        The bore of an annulus.
    sensor_health : bool, default=False
        Assimilation with per-sensor offsets and faulty readings down-weighted; also writes
        sensors.<fmt> and spikes.<fmt> (:mod:`invert.batch.health_tables`).
    offset_sd, offset_rate : float, optional
        Prior sd of an offset and sd of its change over one time scale (default 10 and 1
        median noise sds).
    health_block : str, default="1000"
        Blocks of the sensors table: a record count, or a duration (``30min``, ``2h``).

    Returns
    -------
    dict
        The summary written to summary.json.

    Raises
    ------
    InputError
        Bad input; another run holding ``out``; ``out`` holding files batch did not write; a
        log changed since the interrupted run read it (with ``resume``).
    """
    if engine not in ENGINES:
        raise ValueError(f"The 'engine' parameter of batch must be one of {tuple(ENGINES)}. "
                         f"Got {engine!r} instead.")
    job = job_from_files(layout, query, radius=radius, center=center, smoothness=smoothness,
                          n_modes=n_modes, out=out, fmt=fmt, chunk_rows=chunk_rows,
                          resume=resume, level=level, lam=lam, noise_sd=noise_sd,
                          calibration_frames=calibration_frames, assimilate=assimilate,
                          time_scale=time_scale, ml_frames=ml_frames, steady_tol=steady_tol,
                          max_transient=max_transient, parallel_in_time=parallel_in_time,
                          handover_tol=handover_tol, warmup=warmup,
                          time_format=time_format, unit=unit, kind=kind,
                          inner_radius=inner_radius, sensor_health=sensor_health,
                          offset_sd=offset_sd, offset_rate=offset_rate,
                          health_block=health_block)
    if out_table is not None and not is_database_url(log):
        raise InputError(str(log), "--out-table writes into the log's database: give a "
                                   "database log (sqlite:///FILE or postgresql://...)")
    source = open_log(log, job.sensors, chunk_rows=chunk_rows, time_format=job.time_format,
                      table=table, time_from=time_from, time_to=time_to,
                      **(log_options or {}))
    # the folder is locked before the engine starts: a refused run starts no cluster
    with OutputLock(job.out) as lock, \
            make_engine(engine, scheduler=scheduler, n_workers=n_workers) as eng:
        summary = _run_locked(job, source, eng, lock, on_chunk)
    if out_table is not None:
        _write_back(source, out_table, job)
    return summary


def _write_back(source, name, job):
    db = source.table
    for part in ("frames", "query"):
        db.write_back(f"{name}_{part}", job.out / f"{part}.{job.table_fmt}", job.table_fmt)


def run_job(job, source, engine, *, on_chunk=None):
    """Run ``job`` over ``source`` on ``engine``; publish the outputs and the summary.

    The output folder is locked for the run (:class:`~invert.io.publish.OutputLock`,
    released on every exit); stale staging folders of killed runs are removed; the merged
    frames and query and summary.json are written into a staging folder and swapped in at
    once (:func:`~invert.io.publish.publish`).

    Parameters
    ----------
    job : BatchJob
    source : LogSource
    engine : Engine
    on_chunk : callable, optional
        ``on_chunk(i)`` after each committed chunk.

    Returns
    -------
    dict
        The summary written to ``job.out/summary.json``.
    """
    with OutputLock(job.out) as lock:
        return _run_locked(job, source, engine, lock, on_chunk)


def _run_locked(job, source, engine, lock, on_chunk):
    out = job.out
    check_own_folder(out)
    clean_stale_staging(out)
    work = WorkFolder(out, {"log": source.signature(), "options": job.options()}, job.resume)
    t_start = _time.perf_counter()
    limits = _one_blas_thread()
    bar = _progress()
    try:
        steps = job_chunks(job, source, engine, work)
        while True:
            try:
                step = next(steps)
            except StopIteration as stop:
                hyper, extra = stop.value
                break
            bar.update(step.n_frames)
            _keep_log_warnings(work.manifest, source)
            if on_chunk is not None:
                on_chunk(step.index)
    finally:
        bar.close()
        if limits is not None:
            limits.restore_original_limits()
    stage = staging_folder(out)
    try:
        merge_outputs(work, work.manifest["n_chunks"], stage, job.table_fmt,
                      source.time_kind or "number")
        if job.sensor_health:
            extra = _merge_health(job, source, work, stage, extra)
        summary = _summary(job, source, engine, work, hyper, extra,
                           _time.perf_counter() - t_start, lock.note)
        if job.fmt == "netcdf":
            write_results_nc(stage, labels=job.query_labels, points=job.query_points,
                             point_columns=job.domain.point_columns, summary=summary,
                             unit=job.unit)
        frac, n_frames = work.missing_map()
        write_batch_report(stage, summary, table_fmt=job.table_fmt, labels=job.query_labels,
                           missing=(frac, list(job.sensors), n_frames), unit=job.unit)
        write_json(summary, stage / "summary.json")
        publish(stage, out, lock)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    work.close()
    return summary


def _merge_health(job, source, work, stage, extra):
    from .health_tables import merge_health

    health, warnings = merge_health(work, work.manifest["n_chunks"], stage, job.table_fmt,
                                    sensors=list(job.sensors), z=interval_z(job.level),
                                    kind=work.manifest.get("time_kind") or "number",
                                    settings=work.manifest.get("health", {}))
    return {**extra, "sensor_health": health, "health_warnings": warnings}


def _summary(job, source, engine, work, hyper, extra, elapsed, note=None):
    counts = work.manifest["counts"]
    missing = source.missing_sensors
    warnings = ([f"sensor(s) {', '.join(missing)} of the layout have no column in the log; "
                 f"treated as always missing"] if missing else [])
    warnings += _keep_log_warnings(work.manifest, source)
    if note:
        warnings.append(note)
    extra = dict(extra)
    warnings += extra.pop("health_warnings", [])
    where = {"scheduler": engine.address} if getattr(engine, "address", None) else {}
    summary = {
        "command": "batch",
        "method": "kalman-smoother" if job.assimilate else "tikhonov (fixed per frame)",
        "engine": engine.name,
        **where,
        "log": source.source,
        "format": job.fmt,
        "level": job.level,
        "lam": hyper["lam"],
        "noise_sd": hyper["noise_sd"],
        "s": job.s,
        "hyperparameters": hyper["how"],
        "domain": job.domain.describe(),
        "sensors": {"n": len(job.sensors), "missing_from_log": missing,
                    "sigma": "given per sensor" if job.sigma is not None else
                    "common (noise_sd)"},
        "frames": {"total": int(sum(counts.values())), **{k: int(v) for k, v in counts.items()}},
        "rejections": work.manifest.get("reasons", {}),
        "query_labels": [str(x) for x in job.query_labels],
        "seconds": elapsed,
        **extra,
        "warnings": warnings,
        "cautions": list(CAUTIONS),
    }
    return BatchSummary(to_jsonable(summary))


def _keep_log_warnings(manifest, source):
    """Return the log's warnings, kept in the manifest (a resumed run may not re-read the log)."""
    kept = manifest.setdefault("log_warnings", [])
    for w in getattr(source, "warnings", []):
        if w not in kept:
            kept.append(w)
    return list(kept)


def _progress(total=None):
    return progress(total, desc="batch", unit="frame")


def _one_blas_thread():
    """Limit BLAS to one thread for the run (threadpoolctl, a scikit-learn dependency).

    The products here are small (tens of columns) and many; on a busy machine a multithreaded
    BLAS spends more time waking its threads than computing, and the log reader's threads
    already use the other cores. Measured: per-chunk solve about twice as fast.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - scikit-learn brings it
        return None
    return threadpool_limits(limits=1, user_api="blas")
