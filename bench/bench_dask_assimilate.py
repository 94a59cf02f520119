"""Exact assimilation on dask: 1 worker against 2 workers, and against the local exact run.

The SYNTHETIC log is ``bench_kernel.make_log`` (1 Hz with 3 % timestamp jitter, 24 rim sensors
and 2 probes on the demo disk at the default truncation, 2 % random single-cell drop-outs, one
sensor out for 10 % of the log, a 5-minute whole-ring outage, two logger gaps), written as CSV
as ``bench_assimilate.write_log`` does. Each run is ``run_batch(..., assimilate=True,
fmt="parquet")`` end to end (CSV in, Parquet out) with the noise level and lam fixed at the
pooled-evidence estimates on this log (0.0454, 0.0158) and a fixed time scale, so the three
runs do the same work:

1. ``engine="local"``: the sequential exact chain (the oracle);
2. ``engine="dask", n_workers=1``: the same sequential chain on the cluster;
3. ``engine="dask", n_workers=2``: chunks overlapped, warm-up starts checked at every
   hand-over (``invert.batch.overlap``).

Printed: frames/s of each, the ratio 2 workers / 1 worker, the hand-over entry of summary.json
(warm-up length, tolerance, largest mismatch, chunks re-run) and the largest difference of the
2-worker run from the local one (means and sds of the frames and query tables), and the load
average before each run (the machine is shared: measure when it is below 1).

The warm-up must cover the filter's memory, about one time scale per e-fold of 1/tol (23 time
scales at 1e-10): the maximum-likelihood time scale on this log is about 2.4e5 s (the field
drifts over 4-24 hours), longer than the log, so no chunk could start early there; the figure
uses ``bench_kernel``'s own 3600 s.

Usage: ``python bench/bench_dask_assimilate.py [N] [CHUNK_ROWS] [TIME_SCALE]`` (README figure:
``python bench/bench_dask_assimilate.py 1000000 250000 3600``).
"""

from __future__ import annotations

import os

for _var in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import bench_assimilate as ba  # noqa: E402

from invert.batch.runner import run_batch  # noqa: E402

COLUMNS = {"frames": ("centre_mean", "centre_sd"), "query": ("mean", "sd")}


def largest_difference(a, b):
    """Largest absolute difference of the means and sds of two runs' tables."""
    worst = 0.0
    for name, cols in COLUMNS.items():
        x = pq.read_table(Path(a) / f"{name}.parquet", columns=list(cols))
        y = pq.read_table(Path(b) / f"{name}.parquet", columns=list(cols))
        for c in cols:
            d = np.abs(x[c].to_numpy(zero_copy_only=False) - y[c].to_numpy(zero_copy_only=False))
            worst = max(worst, float(np.nanmax(d)) if d.size else 0.0)
    return worst


def main(argv):
    """Run the three cases: ``argv`` is ``[N] [CHUNK_ROWS] [TIME_SCALE]``."""
    n = int(argv[0]) if argv else 1_000_000
    rows = int(argv[1]) if len(argv) > 1 else 250_000
    ts = float(argv[2]) if len(argv) > 2 else 3600.0
    kw = dict(radius=0.25, lam=0.0158, noise_sd=0.0454, chunk_rows=rows, assimilate=True,
              time_scale=ts, fmt="parquet", say=lambda *_: None)
    with tempfile.TemporaryDirectory() as tmp:
        log, layout = ba.write_log(tmp, n)
        rate = {}
        for name, engine, workers in (("local", "local", 1), ("dask-1", "dask", 1),
                                      ("dask-2", "dask", 2)):
            load = os.getloadavg()[0]
            t0 = time.perf_counter()
            s = run_batch(log, layout, out=Path(tmp) / name, engine=engine, n_workers=workers,
                          **kw)
            rate[name] = n / (time.perf_counter() - t0)
            print(f"{name:>7}: {rate[name]:,.0f} frames/s (load before {load:.2f})", flush=True)
        ho = s["handover"]
        print(f"{n:,d} frames in chunks of {rows:,d}, time scale {ts:g} s: 2 workers / 1 "
              f"worker = {rate['dask-2'] / rate['dask-1']:.2f}x (goal >= 1.6); warm-up "
              f"{ho['warmup_frames']:,d} frames, tolerance {ho['tolerance']:g}; largest "
              f"mismatch accepted {max(ho['forward']['largest'], ho['backward']['largest']):.1e}"
              f"; chunks re-run {ho['forward']['rerun']} forward, {ho['backward']['rerun']} "
              f"backward; largest difference from the local exact run "
              f"{largest_difference(Path(tmp) / 'local', Path(tmp) / 'dask-2'):.1e}")


if __name__ == "__main__":
    main(sys.argv[1:])
