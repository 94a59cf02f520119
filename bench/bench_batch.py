"""Static batch speed and memory against pyarrow's own CSV read, measured in one run.

For each size (default 250,000 and 1,000,000 frames x 32 rim sensors, random drop-outs: each
reading missing with probability 1 %, and 0.1 % of frames with none) the script writes a CSV log
into a temporary folder (not kept), then runs in fresh subprocesses, one after the other:

* baseline: ``pyarrow.csv.read_csv(LOG)`` (all threads, type inference), and
* the job: ``run_batch(LOG, LAYOUT, fmt="parquet", lam=..., noise_sd=...)`` (static mode).

Each subprocess reports its wall time and its peak resident memory from
``resource.getrusage(RUSAGE_SELF).ru_maxrss``. Printed: seconds, the ratio job / baseline
(target <= 3), peak RSS (target < 1.5 GB, flat between sizes), the 1-minute load average before
the pair (the machine is shared: read ratios taken under load with care) and the CPU seconds of
each process (all threads, imports included).

Usage: ``python bench/bench_batch.py [N ...]``
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

CHILD_BASE = r"""
import json, resource, sys, time
import pyarrow.csv as pcsv
t = time.perf_counter()
tab = pcsv.read_csv(sys.argv[1])
dt = time.perf_counter() - t
ru = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps({"seconds": dt, "rows": tab.num_rows, "cpu": ru.ru_utime + ru.ru_stime,
                  "rss_mb": ru.ru_maxrss / 1024}))
"""

CHILD_JOB = r"""
import json, resource, sys, time
from invert.batch.runner import run_batch
t = time.perf_counter()
s = run_batch(sys.argv[1], sys.argv[2], radius=1.0, out=sys.argv[3], fmt="parquet",
              lam=0.01, noise_sd=0.05, say=lambda *a: None)
dt = time.perf_counter() - t
ru = resource.getrusage(resource.RUSAGE_SELF)
print(json.dumps({"seconds": dt, "frames": s["frames"],
                  "patterns": s.get("patterns_factorised"), "cpu": ru.ru_utime + ru.ru_stime,
                  "rss_mb": ru.ru_maxrss / 1024}))
"""


def make_log(path, n, n_sensors=32, rng=0):
    """Write a SYNTHETIC log: slowly varying rim field, noise, random drop-outs."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    rng = np.random.default_rng(rng)
    th = np.linspace(0, 2 * np.pi, n_sensors, endpoint=False)
    block = 250_000
    with pcsv.CSVWriter(path, pa.schema([("time", pa.float64())] +
                                         [(f"s{i:02d}", pa.float64())
                                          for i in range(n_sensors)])) as w:
        for a in range(0, n, block):
            k = np.arange(a, min(a + block, n))
            slow = 2 * np.pi * k / 50_000
            Y = (60 + 3 * np.cos(th[None, :] - slow[:, None])
                 + 0.5 * np.sin(2 * th[None, :] + 0.3 * slow[:, None])
                 + 0.05 * rng.standard_normal((len(k), n_sensors)))
            Y = np.round(Y, 3)
            Y[rng.random(Y.shape) < 0.01] = np.nan
            Y[rng.random(len(k)) < 0.001] = np.nan
            cols = [pa.array(k.astype(float))] + [pa.array(Y[:, j], mask=np.isnan(Y[:, j]))
                                                  for j in range(n_sensors)]
            w.write_table(pa.table(cols, names=w.schema.names if hasattr(w, "schema") else
                                   ["time"] + [f"s{i:02d}" for i in range(n_sensors)]))
    with open(Path(path).with_name("layout.csv"), "w") as fh:
        fh.write("sensor,x,y\n")
        for i, t in enumerate(th):
            fh.write(f"s{i:02d},{np.cos(t):.12f},{np.sin(t):.12f}\n")


def child(code, *args):
    r = subprocess.run([sys.executable, "-c", code, *map(str, args)], capture_output=True,
                       text=True, check=True)
    return json.loads(r.stdout.strip().splitlines()[-1])


def main(sizes):
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for n in sizes:
            log = Path(tmp) / f"log{n}.csv"
            make_log(log, n)
            mb = log.stat().st_size / 1e6
            load = os.getloadavg()[0]
            base = child(CHILD_BASE, log)
            job = child(CHILD_JOB, log, log.with_name("layout.csv"), Path(tmp) / f"out{n}")
            rows.append((n, mb, base, job))
            print(f"{n:>9,d} frames ({mb:,.0f} MB CSV): pyarrow read {base['seconds']:.2f} s "
                  f"(peak {base['rss_mb']:.0f} MB); batch {job['seconds']:.2f} s "
                  f"(peak {job['rss_mb']:.0f} MB); ratio {job['seconds'] / base['seconds']:.2f}"
                  f" (target <= 3); patterns factorised {job['patterns']}; "
                  f"statuses {job['frames']}; load before {load:.2f}; CPU s of the processes "
                  f"(imports included) pyarrow {base['cpu']:.2f}, batch {job['cpu']:.2f}",
                  flush=True)
    if len(rows) > 1:
        print(f"peak RSS of the batch: {rows[0][3]['rss_mb']:.0f} MB at {rows[0][0]:,d} frames, "
              f"{rows[-1][3]['rss_mb']:.0f} MB at {rows[-1][0]:,d} frames (target < 1500 MB, "
              f"flat)")


if __name__ == "__main__":
    main([int(a) for a in sys.argv[1:]] or [250_000, 1_000_000])
