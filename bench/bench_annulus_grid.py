"""Grid evaluation on the annulus against the disk on the same points.

The polar wall grid of ``Annulus(1, 0.5).field_grid(501)`` (about 2e5 points), 24 harmonics per
rim function (98 coefficients; the disk has 49). Prints the best of three timings of
``Annulus.field`` (two Horner sums and the logarithmic terms), ``Disk.field`` (one Horner sum)
on the same points, their ratio (the issue's goal: within 2x), and the design-row route of the
annulus as a baseline. Run: python bench/bench_annulus_grid.py
"""

import time

import numpy as np

from invert.geometry import Annulus, Disk


def best(f, k=3):
    """Return the best of ``k`` wall-clock timings of ``f()``, seconds."""
    times = []
    for _ in range(k):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return min(times)


def main():
    """Time the mean maps and print the ratio."""
    rng = np.random.default_rng(0)
    disk, wall = Disk(1.0, (0.0, 0.0), 24), Annulus(1.0, 0.5, (0.0, 0.0), 24)
    pts, _ = wall.field_grid(501)
    cd, ca = rng.standard_normal(disk.n_coef), rng.standard_normal(wall.n_coef)
    t_disk = best(lambda: disk.field(cd, pts))
    t_wall = best(lambda: wall.field(ca, pts))
    t_rows = best(lambda: wall.design(pts) @ ca)
    print(f"{len(pts)} points: Disk.field {t_disk * 1e3:.1f} ms, Annulus.field "
          f"{t_wall * 1e3:.1f} ms, ratio {t_wall / t_disk:.2f}x (goal <= 2x); annulus design "
          f"rows @ coef {t_rows * 1e3:.1f} ms ({t_rows / t_wall:.1f}x the Horner route)")


if __name__ == "__main__":
    main()
