"""Writing a fit's files: summary.json, boundary.csv, query.csv, field.csv and figures.

Everything is written into a staging folder beside the output folder and moved into place only
when all files are complete, so an error never leaves a half-written set that looks finished.
"""

from __future__ import annotations

import json
import math
import shutil
from contextlib import contextmanager
from pathlib import Path

import numpy as np

from ..intervals import PointSummary

__all__ = ["staged_output", "summary_dict", "write_fit_outputs", "CAUTIONS", "to_jsonable",
           "describe_choice"]

CAUTIONS = (
    "The model assumes a steady, source-free, homogeneous and isotropic field in the region "
    "(the field is harmonic); heat sources, transients or material changes inside break it.",
    "Estimates are no substitute for certified instrumentation.",
    "Where safety is at stake, defer to local codes and licensed practice before acting on an "
    "estimate.",
)


@contextmanager
def staged_output(out_dir):
    """Yield a staging folder; on success publish it as ``out_dir``, the whole set at once.

    The output folder is locked for the run (:class:`~invert.io.publish.OutputLock`: a second
    run on it stops with one line), must hold nothing but an earlier output of the tool
    (:func:`~invert.io.publish.check_own_folder`), and is replaced as a whole by one folder
    exchange (:func:`~invert.io.publish.publish`): at every instant it holds the complete old
    set or the complete new one, so files of an earlier run (an MCMC run's posterior.nc beside a
    new Tikhonov fit) never survive. Staging folders of killed runs are removed first. On an
    exception the staging folder is removed and ``out_dir`` is left as it was.
    """
    from ..io.publish import (
        OutputLock,
        check_own_folder,
        clean_stale_staging,
        publish,
        staging_folder,
    )

    out = Path(out_dir)
    check_own_folder(out, "fit")
    fresh = not out.exists()
    try:
        with OutputLock(out) as lock:
            clean_stale_staging(out, "fit")
            stage = staging_folder(out, "fit")
            try:
                yield stage
                publish(stage, out, lock)
            finally:
                shutil.rmtree(stage, ignore_errors=True)
    except BaseException:
        if fresh and out.is_dir() and not any(out.iterdir()):
            out.rmdir()  # made only to hold the lock: leave no empty folder behind
        raise


def to_jsonable(obj):
    """Convert numpy scalars/arrays and non-finite floats to JSON-safe values."""
    if isinstance(obj, dict) or hasattr(obj, "items"):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return obj


def summary_dict(estimate, problem, readings, *, level, extra=None):
    """Return the content of summary.json for a fit."""
    d = {
        "method": estimate.method,
        "level": level,
        **dict(estimate.info),
        "domain": problem.domain.describe(),
        "readings": {
            "source": readings.source,
            "n_sensors": int(len(readings.value)),
            "n_used": int(problem.n_readings),
            "n_gaps": int(readings.n_gaps),
            "n_on_rim": int(problem.domain.locate(problem.points)[1].sum())
            if problem.points is not None and len(problem.points) else 0,
            "n_snapped_to_rim": int(problem.n_snapped),
            "gap_sensors": [str(s) for s in problem.gap_sensor],
            "sigma": "given per reading" if readings.sigma is not None else "not given",
        },
        "warnings": list(estimate.warnings),
        "cautions": list(CAUTIONS),
    }
    if extra:
        d.update(extra)
    return to_jsonable(d)


def describe_choice(summary):
    """How the fit chose its smoothing, in a few words, from its summary.json content.

    ``"rule evidence"`` (Tikhonov), ``"hyperparameters by type-II maximum likelihood ..."``
    (Gaussian), ``"sampled: log_tau, s"`` (MCMC).
    """
    if summary.get("rule"):
        return f"rule {summary['rule']}"
    how = summary.get("hyperparameters")
    if isinstance(how, str):
        return f"hyperparameters by {how}"
    if summary.get("sampled"):
        return "sampled: " + ", ".join(map(str, summary["sampled"]))
    return "hyperparameters fixed"


def _write_csv(frame, path):
    from ..io.writers import write_csv_frame  # text cells made spreadsheet-safe

    write_csv_frame(frame, path)


def field_summary(estimate, grid, level):
    """Rows of field.csv: the domain's ``field_grid(grid)`` with mean, sd and interval.

    A domain whose field grid is the inside of the tensor grid ``interior_grid(grid)`` (the
    disk) gets the map from :meth:`~invert.problem.Estimate.grid_map` (exact, shared over the
    grid's mirror images); other domains, and any point that map leaves out, use
    :meth:`~invert.problem.Estimate.at`.
    """
    pts, cols = estimate.domain.field_grid(grid)
    tensor = getattr(estimate.domain, "interior_grid", None)
    if tensor is not None:
        xs, ys, _, inside = tensor(grid)
        del _  # the full grid's points are not needed (memory: workflow.MAP_BYTES_PER_POINT)
        g = estimate.grid_map(xs, ys, level)
        arrays = [a.ravel()[inside] for a in (g.mean, g.sd, g.lower, g.upper)]
        del g
        if len(arrays[0]) == len(pts) and not np.isnan(arrays[1]).any():
            return PointSummary(*arrays, level).to_frame(**cols)
    return estimate.at(pts, level).to_frame(**cols)


def write_fit_outputs(stage_dir, estimate, problem, readings, *, level=0.9, query=None,
                      grid=81, summary_extra=None, conductivity=None):
    """Write summary.json, boundary.csv, field.csv and (with ``query``) query.csv.

    Parameters
    ----------
    stage_dir : Path
        Folder to write into (normally from :func:`staged_output`).
    query : tuple (points, labels), optional
    grid : int, default=81
        Interior grid is ``grid`` x ``grid`` over the bounding square, points inside only (a
        domain with a bore: a polar grid of the wall with the same spacing).
    conductivity : float, optional
        For a domain with a heat flow through it (an annulus): summary.json ``heat_flow`` and
        rim_flux.csv, in W/m and W/m^2 with it, per unit conductivity without.
    """
    from ..diagnostics.heat_flow import heat_flow, rim_flux_profile

    stage_dir = Path(stage_dir)
    _write_csv(estimate.boundary(360, level), stage_dir / "boundary.csv")
    flow = heat_flow(estimate, conductivity, level)
    if flow is not None:
        _write_csv(rim_flux_profile(estimate, conductivity, level, 360),
                   stage_dir / "rim_flux.csv")
        summary_extra = {**(summary_extra or {}), "heat_flow": flow.to_dict()}
    if query is not None:
        pts, labels = query
        s = estimate.at(pts, level)
        cols = {"label": labels}
        cols.update({c: pts[:, k] for k, c in enumerate(estimate.domain.point_columns)})
        _write_csv(s.to_frame(**cols), stage_dir / "query.csv")
    _write_csv(field_summary(estimate, grid, level), stage_dir / "field.csv")
    if estimate.extras.get("sensor_table") is not None:
        _write_csv(estimate.extras["sensor_table"], stage_dir / "sensors.csv")
    if estimate.extras.get("posterior") is not None:
        estimate.extras["posterior"].to_netcdf(stage_dir / "posterior.nc", engine="h5netcdf")
    summary = summary_dict(estimate, problem, readings, level=level, extra=summary_extra)
    with open(stage_dir / "summary.json", "w") as fh:
        json.dump(summary, fh, indent=2)
    return summary
