"""``results.nc``: a batch run's query estimates as a CF-conventions netCDF file.

Written by ``batch --format netcdf`` beside ``frames.parquet`` and ``query.parquet``, from
those two files in record batches (memory bounded by a batch, whatever the log's length):

* dimensions ``time`` (every accepted frame: status ``ok`` or ``no-data``, in log order; the
  times are strictly increasing, so ``time`` is a CF coordinate variable without missing
  values) and ``label`` (the query points);
* ``time``: date-time logs as int64 ``nanoseconds since 1970-01-01T00:00:00Z`` (standard name
  ``time``, proleptic Gregorian calendar); numeric logs as written (float64, the log's own
  unit, no standard name);
* ``label`` (strings), ``x``, ``y`` (and ``z``) of each query point;
* ``mean``, ``sd``, ``lower``, ``upper`` on ``(time, label)``: NaN (``_FillValue``) where a
  frame has no estimate;
* ``status`` on ``time``: a CF flag variable (``flag_values`` 0, 1 and ``flag_meanings``
  ``ok no_data``); rejected frames (no usable time) are counted in the global attributes and
  listed in ``frames.parquet``;
* global attributes: ``Conventions = "CF-1.10"``, title, history, source, the model settings
  (method, level, lam, noise_sd, smoothness, time scale) and the cautions.

References
----------
.. [1] CF Conventions 1.10, sections 2.6 (attributes), 3.1 (units), 3.5 (flags) and 4.4
       (time coordinate). https://cfconventions.org/
"""

from __future__ import annotations

import numpy as np

from ..io.arrow import string_codes

__all__ = ["write_results_nc", "NETCDF_NAME"]

#: File name of the netCDF output.
NETCDF_NAME = "results.nc"

_STATUS = {"ok": 0, "no-data": 1}


def _accepted(frames_path):
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    tab = pq.read_table(frames_path, columns=["time", "status"])
    status = pc.cast(tab.column("status"), "string")
    keep = pc.invert(pc.equal(status, "rejected")).fill_null(False)
    tab = tab.filter(keep)
    t = tab.column("time").combine_chunks()
    codes = string_codes(tab.column("status"), list(_STATUS)).astype(np.int8)
    return t, codes, int(len(keep) - pc.sum(keep).as_py())


def _time_values(t):
    import pyarrow as pa

    if pa.types.is_timestamp(t.type):
        return np.asarray(t.cast(pa.timestamp("ns", "UTC")).cast(pa.int64())
                          .to_numpy(zero_copy_only=False), np.int64), True
    return np.asarray(t.cast(pa.float64()).to_numpy(zero_copy_only=False), float), False


def write_results_nc(folder, *, labels, points, point_columns, summary, unit=None):
    """Write ``folder/results.nc`` from ``folder``'s frames.parquet and query.parquet.

    Parameters
    ----------
    folder : Path
        The staging folder holding the merged tables.
    labels : sequence of str
        Query labels, in the query table's order.
    points : ndarray of shape (n_query, dim)
    point_columns : sequence of str
        ``("x", "y")`` or ``("x", "y", "z")``.
    summary : dict
        The run's summary (settings copied into attributes).
    unit : str, optional
        Unit of the readings (the ``units`` of mean, sd, lower, upper).
    """
    import h5netcdf
    import pyarrow.parquet as pq

    t, codes, n_rejected = _accepted(folder / "frames.parquet")
    tv, is_datetime = _time_values(t)
    nq, n = len(labels), len(tv)
    with h5netcdf.File(folder / NETCDF_NAME, "w") as f:
        f.dimensions = {"time": n, "label": nq}
        _global_attributes(f, summary, n_rejected)
        tvar = f.create_variable("time", ("time",), tv.dtype)
        tvar[:] = tv
        if is_datetime:
            tvar.attrs.update({"standard_name": "time", "long_name": "time of the frame",
                               "units": "nanoseconds since 1970-01-01T00:00:00Z",
                               "calendar": "proleptic_gregorian", "axis": "T"})
        else:
            tvar.attrs.update({"long_name": "time of the frame, as written in the log",
                               "axis": "T"})
        import h5py

        lab = f.create_variable("label", ("label",), h5py.string_dtype())
        lab[:] = np.array([str(x) for x in labels], dtype=object)
        lab.attrs["long_name"] = "query point label"
        for j, name in enumerate(point_columns):
            v = f.create_variable(name, ("label",), float)
            v[:] = np.asarray(points, float)[:, j]
            v.attrs["long_name"] = f"{name} coordinate of the query point"
        st = f.create_variable("status", ("time",), np.int8)
        st[:] = codes
        st.attrs.update({"long_name": "status of the frame",
                         "flag_values": np.array([0, 1], np.int8),
                         "flag_meanings": "ok no_data"})
        level = summary.get("level", 0.9)
        names = {"mean": "posterior mean", "sd": "posterior standard deviation",
                 "lower": f"lower end of the central {level:.0%} credible interval",
                 "upper": f"upper end of the central {level:.0%} credible interval"}
        out = {}
        for k, long_name in names.items():
            v = f.create_variable(k, ("time", "label"), float, fillvalue=np.nan,
                                  chunks=(min(max(n, 1), 65536), max(nq, 1)))
            v.attrs["long_name"] = long_name
            v.attrs["coordinates"] = "x y" + (" z" if "z" in point_columns else "")
            if unit:
                v.attrs["units"] = str(unit)
            out[k] = v
        _fill(pq.ParquetFile(folder / "query.parquet"), tv, nq, out)


def _fill(pf, tv, nq, out):
    """Copy the query table into the variables, batch by batch (rows are time-major)."""
    import pyarrow as pa

    rest = None
    for batch in pf.iter_batches(batch_size=65536 * max(nq, 1)):
        tab = pa.Table.from_batches([batch]) if rest is None else \
            pa.concat_tables([rest, pa.Table.from_batches([batch])])
        whole = tab.num_rows - tab.num_rows % nq  # a time's rows may straddle two batches
        rest = tab.slice(whole)
        if whole:
            _write_rows(tab.slice(0, whole), tv, nq, out)
    if rest is not None and rest.num_rows:
        _write_rows(rest, tv, nq, out)


def _write_rows(tab, tv, nq, out):
    qt, _ = _time_values(tab.column("time").combine_chunks())
    rows = qt.reshape(-1, nq)[:, 0]
    pos = np.searchsorted(tv, rows)
    a, b = int(pos[0]), int(pos[-1]) + 1
    for k, v in out.items():
        vals = np.asarray(tab.column(k).to_numpy(), float)
        block = np.full((b - a, nq), np.nan)
        block[pos - a] = vals.reshape(-1, nq)
        v[a:b, :] = block


def _global_attributes(f, summary, n_rejected):
    hyper = {k: summary.get(k) for k in ("method", "level", "lam", "noise_sd", "s",
                                         "time_scale", "recursion") if summary.get(k) is not None}
    f.attrs.update({
        "Conventions": "CF-1.10",
        "title": "rim-invert batch estimates at the query points",
        "source": f"rim-invert batch of {summary.get('log')}",
        "history": "created by rim-invert batch --format netcdf",
        "rejected_frames": int(n_rejected),
        "comment": " ".join(summary.get("cautions", [])),
        **{f"model_{k}": (v if isinstance(v, (int, float)) else str(v))
           for k, v in hyper.items()},
    })
