"""Assimilation speed on a realistic log: recursions, end to end, memory and scratch space.

The SYNTHETIC log is ``bench_kernel.make_log``: one frame per second with timestamp jitter
(each step 1 s +- 3 %), 24 rim sensors and 2 probes on the demo disk (default truncation, 45
coefficients), 2 % of cells blank at random (single cells), one sensor out for 10 % of the
log, a 5-minute outage of the whole ring, 0.01 % of frames with no reading, two logger gaps.

Printed, in one run:

1. Recursions on one core (NUMBA/OMP/OpenBLAS threads 1), on the first ``N_CMP`` frames: the
   default mode of ``batch --assimilate`` (today the exact compiled kernel,
   ``kernel.smooth_model``), the exact mode (the same kernel), and the steady-state shortcut
   (``run_smoother(steady_tol=1e-10, max_transient=50)``, ``--max-transient 50``) with its
   largest differences from the exact smoother: means of the coefficients in units of the
   smoothed sd, query sds relative.
2. End to end, for each size (default 250,000 and 1,000,000 frames), in fresh subprocesses one
   after the other: ``pyarrow.csv.read_csv`` of the CSV log (the baseline) and ``run_batch(...,
   assimilate=True, fmt="parquet")`` with everything estimated on the log (pooled evidence for
   lam and the noise, maximum likelihood for the time scale), their wall times and the ratio,
   the peak resident memory of each process, and the largest size the working folder reached
   (sampled after every committed chunk) and whether it is gone at the end.

Usage: ``python bench/bench_assimilate.py [N_CMP] [N ...]`` (README figures:
``python bench/bench_assimilate.py 20000 250000 1000000``).
"""

from __future__ import annotations

import os

for _var in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import bench_kernel as bk  # noqa: E402

from invert.stages.assimilate import kernel, run_smoother  # noqa: E402

NAMES = [f"r{i:02d}" for i in range(24)] + ["p1", "p2"]

CHILD_BASE = r"""
import json, sys, time
def hwm():
    # own high-water mark (ru_maxrss of a forked child starts at its parent's RSS)
    return next(int(line.split()[1]) for line in open("/proc/self/status")
                if line.startswith("VmHWM")) / 1024
import pyarrow.csv as pcsv
t = time.perf_counter()
tab = pcsv.read_csv(sys.argv[1])
dt = time.perf_counter() - t
print(json.dumps({"seconds": dt, "rows": tab.num_rows, "rss_mb": hwm()}))
"""

CHILD_JOB = r"""
import os
for v in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ[v] = "1"
import json, sys, time
from pathlib import Path
def hwm():
    # own high-water mark (ru_maxrss of a forked child starts at its parent's RSS)
    return next(int(line.split()[1]) for line in open("/proc/self/status")
                if line.startswith("VmHWM")) / 1024
from invert.batch.runner import run_batch
out = Path(sys.argv[3])
peak = [0]
def sample(i):
    work = out / ".batch-work"
    if work.exists():
        peak[0] = max(peak[0], sum(f.stat().st_size for f in work.iterdir() if f.is_file()))
t = time.perf_counter()
s = run_batch(sys.argv[1], sys.argv[2], radius=0.25, out=out, fmt="parquet", assimilate=True,
              on_chunk=sample, say=lambda *a: None)
dt = time.perf_counter() - t
left = [p.name for p in out.iterdir() if p.name.startswith(".")]
print(json.dumps({"seconds": dt, "frames": s["frames"], "time_scale": s["time_scale"],
                  "recursion": s["recursion"], "scratch_mb": peak[0] / 2**20, "left": left,
                  "rss_mb": hwm()}))
"""


def write_log(folder, n):
    """Write ``bench_kernel.make_log(n)`` as a CSV log and its layout; return the paths."""
    import pyarrow as pa
    import pyarrow.csv as pcsv

    t, Y = bk.make_log(n)
    pts = bk.layout()
    layout = Path(folder) / "layout.csv"
    layout.write_text("sensor,x,y\n" + "".join(f"{s},{x:.9f},{y:.9f}\n"
                                               for s, (x, y) in zip(NAMES, pts, strict=True)))
    log = Path(folder) / f"log{n}.csv"
    Y = np.round(Y, 4)
    cols = [pa.array(np.round(t, 3))] + [pa.array(Y[:, j], mask=np.isnan(Y[:, j]))
                                         for j in range(Y.shape[1])]
    pcsv.write_csv(pa.table(cols, names=["time", *NAMES]), log)
    return log, layout


def _child(code, *args):
    r = subprocess.run([sys.executable, "-c", code, *map(str, args)], capture_output=True,
                       text=True, check=True)
    return json.loads(r.stdout.strip().splitlines()[-1])


def _timed(fn, *args, **kw):
    t0 = time.perf_counter()
    out = fn(*args, **kw)
    return out, time.perf_counter() - t0


def recursions(n_cmp):
    """Frames/s of the recursions and the shortcut's differences from the exact smoother."""
    dom, model = bk.make_model()
    km = kernel.KernelModel.from_dynamics(model)
    Hq = dom.design(bk.QUERY)
    t, Y = bk.make_log(n_cmp)
    kernel.smooth_model(km, t[:50], Y[:50], Hq)  # compile (or load the cache)
    exact, dt_exact = _timed(kernel.smooth_model, km, t, Y, Hq)
    print(f"recursions on the first {n_cmp:,d} frames of the realistic log, one core:")
    print(f"  default (exact compiled kernel): {n_cmp / dt_exact:,.0f} frames/s")
    print(f"  exact (--max-transient 0, the same): {n_cmp / dt_exact:,.0f} frames/s")
    short, dt_short = _timed(run_smoother, model, t, Y, steady_tol=1e-10, max_transient=50)
    sd = np.sqrt(np.array([np.diag(short.cov(k)) for k in range(n_cmp)]))
    _, qs = short.at(Hq)
    dm = np.max(np.abs(short.mean - exact.mean) / sd)
    ds = np.max(np.abs(qs / exact.query_sd - 1))
    print(f"  steady-state shortcut (--max-transient 50): {n_cmp / dt_short:,.0f} frames/s; "
          f"from the exact smoother: means {dm:.2e} sd, query sds {ds:.2e} relative")
    return n_cmp / dt_exact


def end_to_end(sizes):
    """CSV in, Parquet out, against pyarrow's read of the same CSV; memory and scratch."""
    rows = []
    for n in sizes:
        with tempfile.TemporaryDirectory() as tmp:
            log, layout = write_log(tmp, n)
            mb = log.stat().st_size / 2**20
            load = os.getloadavg()[0]
            base = _child(CHILD_BASE, log)
            job = _child(CHILD_JOB, log, layout, Path(tmp) / "out")
        rows.append((n, job))
        print(f"{n:>9,d} frames ({mb:,.0f} MB CSV): pyarrow read {base['seconds']:.2f} s; "
              f"batch --assimilate {job['seconds']:.2f} s ({n / job['seconds']:,.0f} frames/s)"
              f"; ratio {job['seconds'] / base['seconds']:.2f} (target <= 4); peak RSS "
              f"{job['rss_mb']:.0f} MB (pyarrow {base['rss_mb']:.0f} MB); working folder at "
              f"most {job['scratch_mb']:.0f} MB, left behind: {job['left'] or 'nothing'}; "
              f"time scale {job['time_scale']:.0f} s; statuses {job['frames']}; "
              f"load before {load:.2f}", flush=True)
    if len(rows) > 1:
        print(f"peak RSS of batch --assimilate: {rows[0][1]['rss_mb']:.0f} MB at "
              f"{rows[0][0]:,d} frames, {rows[-1][1]['rss_mb']:.0f} MB at {rows[-1][0]:,d}")


def main(argv):
    """Run both parts: ``argv`` is ``[N_CMP] [N ...]``."""
    n_cmp = int(argv[0]) if argv else 20_000
    sizes = [int(a) for a in argv[1:]] or [250_000, 1_000_000]
    recursions(n_cmp)
    end_to_end(sizes)


if __name__ == "__main__":
    main(sys.argv[1:])
