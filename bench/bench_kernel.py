"""Speed and memory of the compiled exact smoother (assimilate.kernel) on a realistic log.

SYNTHETIC log, one frame per second with timestamp jitter (each step 1 s +- 3 %, uniform),
on the demo disk (radius 0.25, default truncation: 45 coefficients): 24 rim sensors evenly
spaced plus the two probes of datasets/demo_layout.csv. The rim field drifts slowly (mean
level 60 and harmonics 1-3 as smooth random sinusoids in time), noise sd 0.05. Drop-outs:
2 % of the cells blank at random (single cells), one rim sensor out for 10 % of the log, a
5-minute outage of the whole ring (all 24 rim sensors blank, the probes still read), 0.01 %
of frames with no reading at all, and two logger gaps (10 minutes and 1 hour). The model is
the batch runner's: noise variance 0.05^2, smoothness prior s = 2 with tau^2 = 1 (broad mean
level), time scale 3600 s.

Printed, on one thread (NUMBA_NUM_THREADS, OMP and OpenBLAS set to 1 before the imports):

* frames/s of ``kernel.smooth_model`` (filter + smoother, three query points), after a
  warm-up call that compiles (or loads the cache), and of the filter alone
  (``kernel.filter_loglik``, the cost of one likelihood evaluation of the time-scale fit);
* the baseline, today's exact recursion ``run_smoother(model, t, Y, steady_tol=0,
  max_transient=0)``, on the first ``N_EXACT`` frames, its frames/s and the speed-up;
* the largest differences between the two on those frames: means of the coefficients in units
  of the smoothed sd, query and mean-level sds relative, the log-likelihood relative;
* peak resident memory (``resource.getrusage``) of a fresh process that generates a log and
  runs the kernel on it, for each size in ``MEM_SIZES`` (the log and the outputs are counted
  in it; their sizes are printed beside it).

Usage: ``python bench/bench_kernel.py [N_FRAMES] [N_EXACT] [MEM_SIZES ...]`` (the figures in
the report were measured with ``1000000 3000 100000 1000000``).
"""

from __future__ import annotations

import os

for _var in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import numpy as np  # noqa: E402

from invert import make_domain  # noqa: E402
from invert.prior import SmoothnessPrior  # noqa: E402
from invert.stages.assimilate import kernel  # noqa: E402
from invert.stages.assimilate import CoefficientDynamics, run_smoother  # noqa: E402

RADIUS = 0.25
PROBES = np.array([[0.05, 0.0], [-0.08, 0.06]])  # datasets/demo_layout.csv
NOISE_SD = 0.05
TIME_SCALE = 3600.0
QUERY = np.array([[0.0, 0.0], [0.2, 0.05], [-0.1, -0.1]])


def layout():
    """Sensor positions: 24 rim sensors (counter-clockwise from angle 0), then the probes."""
    th = np.linspace(0, 2 * np.pi, 24, endpoint=False)
    return np.vstack([RADIUS * np.c_[np.cos(th), np.sin(th)], PROBES])


def make_model(mean_var=None):
    """Build the batch runner's dynamics on the demo disk at the default truncation.

    ``mean_var`` replaces the broad mean-level prior variance (1e8 tau^2) when given.
    """
    dom = make_domain(RADIUS)
    pts = layout()
    shape = SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees)
    model = CoefficientDynamics.from_prior(dom.design(pts), np.full(len(pts), NOISE_SD**2),
                                           shape, dom.degrees, tau2=1.0,
                                           time_scale=TIME_SCALE, mean_var=mean_var)
    return dom, model


def make_log(n, rng=0):
    """Generate times and readings (SYNTHETIC) as described in the module docstring."""
    rng = np.random.default_rng(rng)
    pts = layout()
    theta = np.arctan2(pts[:, 1], pts[:, 0])
    rho = np.hypot(pts[:, 0], pts[:, 1]) / RADIUS
    t = np.cumsum(1.0 + rng.uniform(-0.03, 0.03, n))
    t[n // 3:] += 600.0       # a 10-minute logger gap
    t[2 * n // 3:] += 3600.0  # a 1-hour logger gap
    Y = np.full((n, len(pts)), 60.0)
    for deg in range(1, 4):
        for trig in (np.cos, np.sin):
            amp = rng.uniform(0.2, 1.0) / (1 + deg**2)
            per = rng.uniform(4, 24) * 3600
            ph = rng.uniform(0, 2 * np.pi)
            Y += (amp * np.sin(2 * np.pi * t / per + ph)[:, None]
                  * (rho**deg * trig(deg * theta))[None, :])
    Y += 0.3 * np.sin(2 * np.pi * t / 86400.0)[:, None]
    Y += NOISE_SD * rng.standard_normal(Y.shape)
    Y[rng.random(Y.shape) < 0.02] = np.nan                   # single-cell drop-outs
    Y[int(0.40 * n):int(0.50 * n), 7] = np.nan                # one sensor out for 10 %
    a = int(0.55 * n)
    Y[a:a + 300, :24] = np.nan                                # 5-minute whole-ring outage
    Y[rng.random(n) < 1e-4] = np.nan                          # frames with no reading
    return t, Y


def _timed(fn, *args, **kw):
    t0, c0 = time.perf_counter(), time.process_time()
    out = fn(*args, **kw)
    return out, time.perf_counter() - t0, time.process_time() - c0


CHILD = r"""
import os
for v in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
    os.environ[v] = "1"
import json, resource, sys, time
sys.path.insert(0, sys.argv[2])
import bench_kernel as b
from invert.stages.assimilate import kernel
n = int(sys.argv[1])
dom, model = b.make_model()
km = kernel.KernelModel.from_dynamics(model)
Hq = dom.design(b.QUERY)
t, Y = b.make_log(n)
t0 = time.perf_counter()
out = kernel.smooth_model(km, t, Y, Hq)
dt = time.perf_counter() - t0
data = t.nbytes + Y.nbytes + sum(getattr(out, f).nbytes for f in
    ("mean", "query_mean", "query_sd", "level_mean", "level_sd", "chi2", "n_used",
     "frame_loglik"))
ru = resource.getrusage(resource.RUSAGE_SELF)
hwm = next((int(line.split()[1]) for line in open("/proc/self/status")
            if line.startswith("VmHWM")), ru.ru_maxrss)
print(json.dumps({"n": n, "seconds": dt, "rss_mb": ru.ru_maxrss / 1024, "hwm_mb": hwm / 1024,
                  "data_mb": data / 2**20}))
"""


def peak_memory(n):
    """Peak RSS of a fresh process that builds an ``n``-frame log and smooths it."""
    here = os.path.dirname(os.path.abspath(__file__))
    res = subprocess.run([sys.executable, "-c", CHILD, str(n), here], capture_output=True,
                         text=True, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def compare(n_exact, mean_var=None):
    """Kernel against ``run_smoother(steady_tol=0, max_transient=0)`` on an ``n_exact`` log."""
    dom, model = make_model(mean_var)
    Hq = dom.design(QUERY)
    t, Y = make_log(n_exact, rng=1)
    ref, dt_e, _ = _timed(run_smoother, model, t, Y, steady_tol=0.0, max_transient=0)
    out = kernel.smooth_model(model, t, Y, Hq)
    sd = np.sqrt(np.array([np.diag(ref.cov(k)) for k in range(n_exact)]))
    qm, qs = ref.at(Hq)
    z = np.max(np.abs(out.mean - ref.mean) / sd, axis=1)
    zq = np.max(np.abs(out.query_mean - qm) / qs, axis=1)
    rq = np.max(np.abs(out.query_sd - qs) / qs, axis=1)
    rl = np.abs(out.level_sd[:, 0] - sd[:, 0]) / sd[:, 0]
    dll = abs(out.loglik - ref.loglik) / abs(ref.loglik)
    return dt_e, z, zq, rq, rl, dll


def main(n=1_000_000, n_exact=3000, mem_sizes=(100_000, 1_000_000)):
    """Print the figures listed in the module docstring."""
    # memory first, from a small parent (a child's ru_maxrss starts at its parent's RSS when
    # forked, so the child reads its own high-water mark VmHWM as well)
    mem = [peak_memory(m) for m in mem_sizes]
    dom, model = make_model()
    km = kernel.KernelModel.from_dynamics(model)
    Hq = dom.design(QUERY)
    t, Y = make_log(n)
    _, warm, _ = _timed(kernel.smooth_model, km, t[:500], Y[:500], Hq)
    out, dt_k, cpu_k = _timed(kernel.smooth_model, km, t, Y, Hq)
    _, dt_f, cpu_f = _timed(kernel.filter_loglik, km, t, Y)
    miss = np.mean(np.isnan(Y))
    print(f"log: {n:,d} frames x {Y.shape[1]} sensors (24 rim + 2 probes), "
          f"{model.n_coef} coefficients, {miss:.1%} of cells missing, jitter +-3 %, "
          f"2 gaps; one thread")
    print(f"kernel warm-up (compile or cache load, 500 frames): {warm:.2f} s")
    print(f"kernel exact filter + smoother: {dt_k:.2f} s, {n / dt_k:,.0f} frames/s "
          f"({n / cpu_k:,.0f} per CPU second; target >= 20,000 per core)")
    print(f"kernel filter only (one likelihood evaluation): {dt_f:.2f} s, "
          f"{n / dt_f:,.0f} frames/s ({n / cpu_f:,.0f} per CPU second)")
    for mean_var, label in ((None, "broad mean-level prior 1e8 tau^2 (batch runner)"),
                            (1e4, "mean-level prior variance 1e4")):
        dt_e, z, zq, rq, rl, dll = compare(n_exact, mean_var)
        if mean_var is None:
            print(f"baseline run_smoother(steady_tol=0, max_transient=0) on a separate "
                  f"{n_exact:,d}-frame log of the same kind: {dt_e:.2f} s, "
                  f"{n_exact / dt_e:,.0f} frames/s; kernel speed-up "
                  f"{(n / dt_k) / (n_exact / dt_e):,.1f}x")
        print(f"largest differences, kernel - baseline, {label}: coefficient means "
              f"{z.max():.1e} sd, query means {zq.max():.1e} sd, query sds {rq.max():.1e} "
              f"relative, mean-level sd {rl.max():.1e} relative, log-likelihood {dll:.1e} "
              f"relative")
        if mean_var is None:
            at = [k for k in (0, 10, 100, 1000) if k < n_exact] + [n_exact - 1]
            print(f"  per frame (frames {', '.join(map(str, at))}), coefficient means in sd: "
                  + ", ".join(f"{z[k]:.1e}" for k in at) + "; query sds relative: "
                  + ", ".join(f"{rq[k]:.1e}" for k in at)
                  + " (the baseline's own error under the broad prior: see the report)")
    for r in mem:
        print(f"peak memory, fresh process, {r['n']:,d} frames: VmHWM {r['hwm_mb']:,.0f} MB, "
              f"ru_maxrss {r['rss_mb']:,.0f} MB (log + outputs {r['data_mb']:,.0f} MB; kernel "
              f"{r['seconds']:.2f} s)")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:]]
    main(*args[:2], *([tuple(args[2:])] if len(args) > 2 else []))
