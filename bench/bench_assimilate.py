"""Speed of the Kalman filter + RTS smoother over a long log, and the steady-state shortcut.

SYNTHETIC data: 32 rim sensors (radius 1), one frame per second; the rim field drifts slowly
(harmonics 0-3 as smooth random sinusoids in time) with noise sd 0.05; drop-out episodes of
5-60 minutes (a channel at a time, about ``episodes`` of them spread over the log) and two
logger gaps (plus one drop-out and a 2-minute gap within the first 5,000 frames). Run on one
core (BLAS limited to one thread) in this process:

* the smoother over all frames with ``steady_tol=1e-10`` and ``max_transient`` (gain frozen
  where the pattern and step stay the same), in frames per wall-clock second and per CPU
  second of this process (the per-core rate, not diluted when other jobs share the machine;
  target >= 100,000 per core);
* baseline: the same code with ``steady_tol=0`` (every frame a full Kalman/RTS step) on the
  first ``n_exact`` frames, also in frames per second, and the ratio;
* the largest difference between the two on those frames (means and sds at the centre).

Usage: ``python bench/bench_assimilate.py [N_FRAMES] [EPISODES] [N_EXACT] [MAX_TRANSIENT]``
(the figures were measured with ``1000000 20 5000 50``).
"""

from __future__ import annotations

import sys
import time

import numpy as np
from threadpoolctl import threadpool_limits

from invert.prior import SmoothnessPrior
from invert.stages.assimilate import CoefficientDynamics, run_smoother
from invert.workflow import make_domain


def make_log(n, episodes=20, rng=0):
    """Times and readings (SYNTHETIC) as described in the module docstring."""
    rng = np.random.default_rng(rng)
    th = np.linspace(0, 2 * np.pi, 32, endpoint=False)
    t = np.arange(n, dtype=float)
    for g in (n // 3, 2 * n // 3):
        t[g:] += 600.0  # two 10-minute logger gaps
    Y = np.full((n, 32), 60.0)
    for deg in range(4):
        for trig in (np.cos, np.sin):
            amp = rng.uniform(0.2, 1.0) / (1 + deg**2)
            per = rng.uniform(4, 24) * 3600
            ph = rng.uniform(0, 2 * np.pi)
            Y += amp * np.sin(2 * np.pi * t / per + ph)[:, None] * trig(deg * th)[None, :]
    Y += 0.05 * rng.standard_normal(Y.shape)
    # one episode and one short gap early, inside the part compared with the exact recursion
    Y[2000:3500, 5] = np.nan
    t[4000:] += 120.0
    for _ in range(episodes - 1):
        a = rng.integers(n)
        Y[a:a + rng.integers(300, 3600), rng.integers(32)] = np.nan
    return t, Y


def main(n=1_000_000, episodes=20, n_exact=20_000, max_transient=50, time_scale=3600.0):
    dom = make_domain(1.0)
    th = np.linspace(0, 2 * np.pi, 32, endpoint=False)
    H = dom.design(np.c_[np.cos(th), np.sin(th)])
    shape = SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees)
    model = CoefficientDynamics.from_prior(H, np.full(32, 0.05**2), shape, dom.degrees,
                                           tau2=1.0, time_scale=time_scale)
    t, Y = make_log(n, episodes)
    with threadpool_limits(limits=1, user_api="blas"):
        t0, c0 = time.perf_counter(), time.process_time()
        fast = run_smoother(model, t, Y, steady_tol=1e-10, max_transient=max_transient)
        dt_fast, cpu_fast = time.perf_counter() - t0, time.process_time() - c0
        t0 = time.perf_counter()
        exact = run_smoother(model, t[:n_exact], Y[:n_exact], steady_tol=0)
        dt_exact = time.perf_counter() - t0
        part = run_smoother(model, t[:n_exact], Y[:n_exact], steady_tol=1e-10,
                            max_transient=max_transient)
    fps_fast, fps_exact = n / dt_fast, n_exact / dt_exact
    Hq = dom.design(np.array([[0.0, 0.0], [0.9, 0.1], [0.5, -0.5]]))
    me, se = exact.at(Hq)
    mp, sp = part.at(Hq)
    dm = np.max(np.abs(mp - me))
    ds = np.max(np.abs(sp - se))
    rel = np.max(np.abs(sp - se) / se)
    print(f"{n:,d} frames, {episodes} drop-out episodes, 2 gaps, time scale {time_scale:g} s; "
          f"one BLAS thread")
    print(f"steady state after at most {max_transient} exact steps per run: {dt_fast:.2f} s, "
          f"{fps_fast:,.0f} frames per wall-clock second, {n / cpu_fast:,.0f} frames per CPU "
          f"second (target >= 100,000 per core); {len(fast.cov_table):,d} distinct smoothed "
          f"covariances")
    print(f"exact recursion (baseline, first {n_exact:,d} frames): {fps_exact:,.0f} frames/s; "
          f"speed-up {fps_fast / fps_exact:.1f}x")
    print(f"largest difference on those frames at 3 points (centre, near the rim, inside): "
          f"mean {dm:.2e}, sd {ds:.2e} (relative {rel:.1%}); readings ~60, noise sd 0.05")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:]]
    main(*args)
