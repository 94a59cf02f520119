"""``report.html`` of a batch run: a reanalysis one can look at.

Self-contained (figures embedded as PNG), built from the merged ``frames`` and ``query``
tables read in record batches, so its cost and size do not grow with the log beyond a few
passes over the tables:

* the query points' time series with their credible bands. Long logs are thinned by
  envelopes: the time axis is cut into ``N_BINS`` columns (about one per pixel) and each column
  shows the lowest lower bound and highest upper bound of the band, and the range of the mean,
  so no extreme is hidden;
* the status of every frame along the log (counts of ok, no-data and rejected per column);
* a sensor-by-frame map of missing readings (fraction missing per sensor and block of frames,
  gathered as the log was read);
* the fitted hyperparameters and time scale, the warnings and the cautions (first);
* with the sensor-health model, the offsets' reference, the flag rule, the flagged sensors
  and their offsets over time with bands (:mod:`.health_figures`).
"""

from __future__ import annotations

import base64
import html
from pathlib import Path

import numpy as np

from ..io.arrow import string_codes
from .plots import BAND, LINE, WARN, mpl_pyplot, save_figure, shorten

__all__ = ["write_batch_report", "envelopes", "N_BINS"]

#: Columns of the thinned time axis (about one per pixel of a 10-inch, 100-dpi figure).
N_BINS = 1000
_STATUS_CODES = {"ok": 0, "no-data": 1, "rejected": 2}


def _batches(path, columns):
    """Yield the tables of ``path`` (parquet or csv) as record batches of ``columns``."""
    if path.suffix == ".parquet":
        import pyarrow.parquet as pq

        yield from pq.ParquetFile(path).iter_batches(batch_size=1 << 18, columns=columns)
        return
    import pyarrow.csv as pcsv

    reader = pcsv.open_csv(path, convert_options=pcsv.ConvertOptions(include_columns=columns))
    yield from reader


def _seconds(col):
    import pyarrow as pa

    if pa.types.is_timestamp(col.type):
        ns = col.cast(pa.timestamp("ns", "UTC")).cast(pa.int64())
        return np.asarray(ns.to_numpy(zero_copy_only=False), float) / 1e9, True
    return np.asarray(col.cast(pa.float64()).to_numpy(zero_copy_only=False), float), False


def _status_columns(frames):
    """Count each status per block of frames (frame order): ``(edges, counts)``."""
    codes = []
    for b in _batches(frames, ["status"]):
        codes.append(string_codes(b.column(0), list(_STATUS_CODES), missing=2).astype(np.int8))
    codes = np.concatenate(codes) if codes else np.zeros(0, np.int8)
    n = len(codes)
    edges = np.linspace(0, max(n, 1), min(N_BINS, max(n, 1)) + 1)
    which = np.clip(np.searchsorted(edges, np.arange(n), side="right") - 1, 0, len(edges) - 2)
    counts = np.zeros((len(edges) - 1, 3))
    np.add.at(counts, (which, codes), 1)
    return edges, counts


def _raw_series(query, labels):
    """Per label: times, mean, lower, upper of every row (short logs)."""
    import pyarrow as pa

    tab = pa.Table.from_batches(list(_batches(query, ["time", "label", "mean", "lower",
                                                      "upper"])))
    t, dt = _seconds(tab.column("time").combine_chunks())
    lab = string_codes(tab.column("label"), labels)
    out = []
    for i in range(len(labels)):
        k = lab == i
        out.append([t[k]] + [np.asarray(tab.column(c).to_numpy(), float)[k]
                             for c in ("mean", "lower", "upper")])
    return out, dt


def _n_rows(path):
    if path.suffix == ".parquet":
        import pyarrow.parquet as pq

        return pq.ParquetFile(path).metadata.num_rows
    return sum(b.num_rows for b in _batches(path, ["time"]))


def envelopes(query, labels, t_range):
    """Per label and time column: min lower, max upper, min and max mean."""
    t0, t1 = t_range
    edges = np.linspace(t0, t1 if t1 > t0 else t0 + 1, N_BINS + 1)
    nq = len(labels)
    lo = np.full((nq, N_BINS), np.inf)
    hi = np.full((nq, N_BINS), -np.inf)
    mlo, mhi = lo.copy(), hi.copy()
    dt = False
    for b in _batches(query, ["time", "label", "mean", "lower", "upper"]):
        t, dt = _seconds(b.column(0))
        lab = string_codes(b.column(1), labels)
        col = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, N_BINS - 1)
        vals = [np.asarray(b.column(k).to_numpy(zero_copy_only=False), float)
                for k in ("mean", "lower", "upper")]
        ok = (lab >= 0) & np.isfinite(t)
        for arr, target, fn in ((vals[1], lo, np.minimum), (vals[2], hi, np.maximum),
                                (vals[0], mlo, np.minimum), (vals[0], mhi, np.maximum)):
            fn.at(target, (lab[ok], col[ok]), arr[ok])
    return edges, lo, hi, mlo, mhi, dt


def _time_axis(ax, dt):
    ax.set_xlabel("time (UTC)" if dt else "time (as in the log)")
    if dt:
        import matplotlib.dates as mdates

        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(mdates.AutoDateLocator()))


def _x(edges, dt):
    mid = 0.5 * (edges[:-1] + edges[1:])
    return (mid * 1e9).astype("datetime64[ns]") if dt else mid


def _series_figure(plt, out, query, labels, t_rng, unit, level):
    """Draw the query series: every frame of a short log, envelopes per column of a long one."""
    n = len(labels)
    fig, axes = plt.subplots(n, 1, figsize=(10, 2.2 * n + 0.8), sharex=True, squeeze=False)
    if _n_rows(query) <= 2 * N_BINS * n:
        series, dt = _raw_series(query, labels)
        for (t, m, lo, hi), ax in zip(series, axes[:, 0], strict=True):
            x = (t * 1e9).astype("datetime64[ns]") if dt else t
            ax.fill_between(x, lo, hi, color=BAND, lw=0, label=f"{level:.0%} band")
            ax.plot(x, m, color=LINE, lw=0.8, label="mean")
        caption = f"Posterior mean and {level:.0%} band at each query point, every frame."
    else:
        edges, lo, hi, mlo, mhi, dt = envelopes(query, labels, t_rng)
        x = _x(edges, dt)
        for i, ax in enumerate(axes[:, 0]):
            has = np.isfinite(lo[i]) & np.isfinite(hi[i])
            ax.fill_between(x, np.where(has, lo[i], np.nan), np.where(has, hi[i], np.nan),
                            color=BAND, lw=0, label=f"{level:.0%} band")
            ax.fill_between(x, np.where(has, mlo[i], np.nan), np.where(has, mhi[i], np.nan),
                            color=LINE, lw=0.8, label="mean")
        caption = (f"Posterior mean and {level:.0%} band at each query point. The time axis "
                   f"has {N_BINS} columns; each shows the lowest lower and highest upper "
                   f"bound, and the range of the mean, of the frames in it (no extreme is "
                   f"hidden).")
    for ax, name in zip(axes[:, 0], labels, strict=True):
        ax.set_ylabel(f"{shorten(str(name), 18)}" + (f" ({unit})" if unit else ""))
    axes[0, 0].legend(loc="upper right", fontsize=8)
    _time_axis(axes[-1, 0], dt)
    fig.suptitle("query points: posterior mean and credible band")
    fig.tight_layout()
    return save_figure(plt, fig, out / "batch_series.png"), caption


def _figures(out, frames, query, labels, missing, unit, level):
    plt = mpl_pyplot()
    figs = []
    t_rng = _time_range(frames)
    if t_rng is not None and labels:
        figs.append(_series_figure(plt, out, query, labels, t_rng, unit, level))
    edges, counts = _status_columns(frames)
    fig, ax = plt.subplots(figsize=(10, 2.2))
    mid = 0.5 * (edges[:-1] + edges[1:])
    width = edges[1] - edges[0] if len(edges) > 1 else 1
    bottom = np.zeros(len(mid))
    for k, (name, colour) in enumerate((("ok", BAND), ("no-data", "#bbbbbb"),
                                        ("rejected", WARN))):
        ax.bar(mid, counts[:, k], width=width, bottom=bottom, color=colour, label=name, lw=0)
        bottom += counts[:, k]
    ax.set_xlabel("frame (log order)")
    ax.set_ylabel("frames per column")
    ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=8)
    fig.tight_layout()
    figs.append((save_figure(plt, fig, out / "batch_status.png"),
                 "Status of every frame along the log: ok, no-data (no reading) and rejected "
                 "(the reason is in the frames table)."))
    if missing is not None and missing[0].size:
        frac, sensors, n_frames = missing
        fig, ax = plt.subplots(figsize=(10, 0.22 * len(sensors) + 1.4))
        im = ax.imshow(frac, aspect="auto", interpolation="nearest", cmap="Oranges",
                       vmin=0, vmax=1, extent=(0, n_frames, len(sensors) - 0.5, -0.5))
        ax.set_yticks(range(len(sensors)), [shorten(str(s), 14) for s in sensors], fontsize=7)
        ax.set_xlabel("frame (log order)")
        fig.colorbar(im, ax=ax, label="fraction missing", fraction=0.03)
        fig.tight_layout()
        figs.append((save_figure(plt, fig, out / "batch_missing.png"),
                     "Missing readings: the fraction of frames without a reading, per sensor "
                     "and block of frames."))
    return figs


def _time_range(frames):
    lo, hi, any_t = np.inf, -np.inf, False
    for b in _batches(frames, ["time"]):
        t, _ = _seconds(b.column(0))
        t = t[np.isfinite(t)]
        if t.size:
            lo, hi, any_t = min(lo, t.min()), max(hi, t.max()), True
    return (lo, hi) if any_t else None


def write_batch_report(out, summary, *, table_fmt, labels, missing=None, unit=None):
    """Write ``out/report.html`` (and its figures, embedded) for a batch run.

    Parameters
    ----------
    out : Path
        The staging folder with the merged tables.
    summary : dict
        The run's summary.
    table_fmt : {"parquet", "csv"}
    labels : sequence of str
        Query labels.
    missing : tuple (fraction, sensors, n_frames), optional
        Fraction of missing readings, shape (n_sensors, n_blocks), from the run.
    unit : str, optional
    """
    out = Path(out)
    frames, query = out / f"frames.{table_fmt}", out / f"query.{table_fmt}"
    figs = _figures(out, frames, query, list(labels), missing, unit or "",
                    summary.get("level", 0.9))
    health = summary.get("sensor_health")
    if health is not None:
        from .health_figures import health_figure, health_html

        fig = health_figure(out, table_fmt, health.get("flagged", []), unit=unit or "",
                            level=summary.get("level", 0.9))
        figs = figs + ([fig] if fig is not None else [])
    e = html.escape
    fr = summary.get("frames", {})
    rows = [("frames", f"{fr.get('total', 0):,} ({fr.get('ok', 0):,} ok, "
                       f"{fr.get('no-data', 0):,} no-data, {fr.get('rejected', 0):,} rejected)"),
            ("method", summary.get("method")), ("hyperparameters", summary.get("hyperparameters")),
            ("lam", summary.get("lam")), ("noise sd", summary.get("noise_sd")),
            ("time scale", summary.get("time_scale")),
            ("recursion", summary.get("recursion")), ("log", summary.get("log"))]
    parts = ["<!doctype html><html><head><meta charset='utf-8'><title>rim-invert batch report"
             "</title><style>body{font-family:sans-serif;max-width:62em;margin:2em auto}"
             "img{max-width:100%}td{padding:.15em .6em;vertical-align:top}"
             ".caution{background:#fff4e5;padding:.6em 1em}</style></head><body>",
             "<h1>rim-invert batch report</h1>",
             "<div class='caution'><h2>Cautions</h2><ul>"
             + "".join(f"<li>{e(c)}</li>" for c in summary.get("cautions", [])) + "</ul></div>"]
    if summary.get("warnings"):
        parts.append("<h2>Warnings</h2><ul>" + "".join(f"<li>{e(str(w))}</li>"
                                                       for w in summary["warnings"]) + "</ul>")
    parts.append("<h2>Run</h2><table>" + "".join(
        f"<tr><td>{e(k)}</td><td>{e(str(v))}</td></tr>" for k, v in rows if v is not None)
        + "</table>")
    if health is not None:
        parts.append(health_html(health))
    for path, cap in figs:
        data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
        parts.append(f"<figure><img alt='{e(Path(path).stem)}' src='data:image/png;base64,"
                     f"{data}'><figcaption>{e(cap)}</figcaption></figure>")
        Path(path).unlink()
    parts.append("</body></html>")
    (out / "report.html").write_text("\n".join(parts), encoding="utf-8")
