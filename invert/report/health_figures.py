"""The sensor-health part of the batch report: flagged sensors' offsets over time with bands.

Reads ``sensors.<fmt>`` (:mod:`invert.batch.health_tables`): one row per sensor and block of
time. Each flagged sensor gets a panel with its block offsets (the mean as a step line, the
interval at the run's level as a band, flagged blocks marked) against zero.
"""

from __future__ import annotations

import html
from pathlib import Path

import numpy as np

from .plots import BAND, LINE, WARN, mpl_pyplot, save_figure, shorten

__all__ = ["health_figure", "health_html", "MAX_PANELS"]

#: Flagged sensors drawn (the largest offsets first); the table lists every one.
MAX_PANELS = 12


def _read(path):
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    table = pq.read_table(path) if Path(path).suffix == ".parquet" else pcsv.read_csv(path)
    return table.to_pandas()


def _times(col):
    """Block start and end as plot x values (datetimes stay datetimes)."""
    if np.issubdtype(col.dtype, np.datetime64) or str(col.dtype).startswith("datetime"):
        return col.dt.tz_localize(None).to_numpy() if col.dt.tz is not None else col.to_numpy()
    return col.to_numpy(dtype=float)


def health_figure(out, table_fmt, flagged, *, unit="", level=0.9):
    """Draw ``sensor_offsets.png``: one panel per flagged sensor (at most ``MAX_PANELS``).

    Returns
    -------
    (path, caption) or None
        None when no sensor is flagged.
    """
    if not flagged:
        return None
    sens = _read(Path(out) / f"sensors.{table_fmt}")
    names = [f["sensor"] for f in sorted(flagged, key=lambda f: -abs(f["largest_offset"]))]
    names = names[:MAX_PANELS]
    plt = mpl_pyplot()
    fig, axes = plt.subplots(len(names), 1, figsize=(10, 1.9 * len(names) + 0.8), sharex=True,
                             squeeze=False)
    for name, ax in zip(names, axes[:, 0], strict=True):
        rows = sens[sens["sensor"] == name]
        x = np.concatenate([_times(rows["time_start"]), _times(rows["time_end"])[-1:]])
        lo, hi, m = (np.r_[rows[c].to_numpy(), rows[c].to_numpy()[-1]]
                     for c in ("offset_lower", "offset_upper", "offset_mean"))
        ax.fill_between(x, lo, hi, step="post", color=BAND, lw=0, label=f"{level:.0%} interval")
        ax.step(x, m, where="post", color=LINE, lw=1.0, label="offset (block mean)")
        ax.axhline(0.0, color="#777777", lw=0.6)
        flag = rows["flag"].to_numpy(bool)
        if flag.any():
            ax.plot(_times(rows["time_start"])[flag], rows["offset_mean"].to_numpy()[flag],
                    "v", color=WARN, ms=4, label="flagged block")
        ax.set_ylabel(shorten(str(name), 14) + (f" ({unit})" if unit else ""))
    axes[0, 0].legend(loc="upper left", fontsize=8)
    axes[-1, 0].set_xlabel("time (block starts)")
    fig.suptitle("flagged sensors: estimated offset over time")
    fig.tight_layout()
    caption = (f"Estimated offset of each flagged sensor per block of time: block mean of the "
               f"smoothed offset and its {level:.0%} interval (conservative for the block "
               f"mean); triangles mark flagged blocks."
               + (f" The {len(flagged) - len(names)} other flagged sensor(s) are in the "
                  f"sensors table." if len(flagged) > len(names) else ""))
    return save_figure(plt, fig, Path(out) / "sensor_offsets.png"), caption


def health_html(health):
    """Return the report's sensor-health section (HTML) from summary.json's entry."""
    e = html.escape
    flagged = health.get("flagged", [])
    items = "".join(f"<li>{e(str(f['sensor']))}: offset up to {f['largest_offset']:.4g} "
                    f"(sd {f['largest_offset_sd']:.2g}), flagged from {e(str(f['since']))}</li>"
                    for f in flagged) or "<li>no sensor flagged</li>"
    return ("<h2>Sensor health</h2>"
            f"<p>Offsets: {e(str(health.get('reference', '')))}. Flag rule: "
            f"{e(str(health.get('flag_rule', '')))}; blocks of {e(str(health.get('block')))}. "
            f"{health.get('spikes', 0)} reading(s) judged faulty "
            f"({e(str(health.get('spike_rule', '')))}), down-weighted and listed in the "
            f"spikes table.</p><ul>{items}</ul>")
