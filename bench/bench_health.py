"""Speed of the sensor-health model (offsets and fault weighting) on the compiled kernel.

The realistic SYNTHETIC log of bench/bench_kernel.py (``make_log``: 26 sensors, 45
coefficients, drop-outs, logger gaps), one thread. Printed: frames/s of the exact filter +
smoother (``kernel.smooth_model``, three query points) on the plain model, and on the
sensor-health model (``health.augment``: 25 offset contrasts added to the state, every
reading weighted by its good/faulty probability; three query points plus the 26 offset
rows), after a warm-up call of each, and the ratio. The state grows from 45 (padded to 48)
to 70 (padded to 72) columns, so the O(p^2) work per reading grows by about (72/48)^2 = 2.25;
the 26 extra query rows add O(26 p^2) per frame.

Usage: ``python bench/bench_health.py [N_FRAMES]`` (default 100000).
"""

from __future__ import annotations

import os

for _var in ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_var] = "1"

import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import bench_kernel as bk  # noqa: E402

from invert.stages.assimilate import health, kernel  # noqa: E402


def _rate(model, t, Y, Hq):
    kernel.smooth_model(model, t[:200], Y[:200], Hq)  # warm-up: compile or load the cache
    t0 = time.perf_counter()
    kernel.smooth_model(model, t, Y, Hq)
    return len(t) / (time.perf_counter() - t0)


def main(n=100_000):
    """Print frames/s with and without the health model, and their ratio."""
    dom, model = bk.make_model()
    t, Y = bk.make_log(n)
    Hq = dom.design(bk.QUERY)
    plain = kernel.KernelModel.from_dynamics(model)
    aug = health.augment(model)
    extra = aug.n_coef - model.n_coef
    Hq_aug = np.vstack([np.hstack([Hq, np.zeros((len(Hq), extra))]),
                        health.offset_rows(model.n_coef, len(model.H))])
    r0 = _rate(plain, t, Y, Hq)
    r1 = _rate(aug, t, Y, Hq_aug)
    print(f"frames: {n}, sensors: {len(model.H)}, coefficients: {model.n_coef} "
          f"(+{extra} offset contrasts)")
    print(f"plain kernel:        {r0:12,.0f} frames/s")
    print(f"with sensor health:  {r1:12,.0f} frames/s")
    print(f"slow-down factor:    {r0 / r1:12.2f}")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 100_000)
