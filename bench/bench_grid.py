"""Grid evaluation speed: Horner's rule vs trapezoid Poisson-integral quadrature.

501 x 501 grid over the disk (points inside only), 64 harmonics. Prints the time of
  - Disk.field (Horner's rule in w = (z - c)/R),
  - a bare numpy complex Horner loop written here (the floor for this approach),
  - a 512-node trapezoid quadrature of the Poisson integral of the same rim function,
  - the posterior sd map on the same grid (Estimate.at),
with ratios measured in this run, and the largest difference between Horner and quadrature
where rho <= 0.9 (the quadrature is inaccurate near the rim). Run: python bench/bench_grid.py
"""

import time

import numpy as np

from invert import Disk, LinearProblem, Tikhonov, poisson_kernel


def best_of(fn, repeat=3):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main():
    rng = np.random.default_rng(0)
    d = Disk(1.0, (0.0, 0.0), 64)
    c = rng.standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    xs, ys, pts, inside = d.interior_grid(501)
    P = pts[inside]
    z = P[:, 0] + 1j * P[:, 1]

    t_field, u = best_of(lambda: d.field(c, P))

    C = np.concatenate([[c[0]], c[1::2] - 1j * c[2::2]])

    def bare():
        acc = np.full(z.shape, C[-1], dtype=complex)
        for Cn in C[-2::-1]:
            acc = acc * z + Cn
        return acc.real

    t_bare, u_bare = best_of(bare)

    M = 512
    phi = np.arange(M) * 2 * np.pi / M
    f = d.field(c, d.from_polar(1.0, phi))
    r, th = np.abs(z), np.angle(z)

    def quad():
        np.seterr(invalid="ignore", divide="ignore")  # 0/0 at grid points on the rim itself
        out = np.empty(len(z))
        for s in range(0, len(z), 4096):
            K = poisson_kernel(r[s:s + 4096, None], th[s:s + 4096, None], phi[None, :])
            out[s:s + 4096] = K @ f * (2 * np.pi / M)
        return out

    t_quad, u_quad = best_of(quad, repeat=1)

    th_s = np.linspace(0, 2 * np.pi, 24, endpoint=False)[4:]
    sp = d.from_polar(1.0, th_s)
    prob = LinearProblem(d.design(sp), d.design(sp) @ c, np.full(len(sp), 0.05), d.degrees,
                         d.eigenvalues, d)
    est = Tikhonov("fixed", lam=0.05**2).fit(prob)
    t_sd, _ = best_of(lambda: est.at(P), repeat=1)

    core = r <= 0.9
    print(f"grid 501x501, {len(P)} points inside, {d.n_modes} harmonics")
    print(f"Disk.field (Horner)          {t_field * 1e3:9.1f} ms")
    print(f"bare numpy Horner loop       {t_bare * 1e3:9.1f} ms")
    print(f"512-node trapezoid quadrature{t_quad * 1e3:9.1f} ms")
    print(f"sd map (Estimate.at)         {t_sd * 1e3:9.1f} ms")
    print(f"max |Horner - quadrature| where rho <= 0.9: {np.max(np.abs(u - u_quad)[core]):.2e}")
    print(f"max |Horner - bare loop|: {np.max(np.abs(u - u_bare)):.2e}")
    print(f"ratio quadrature / Disk.field: {t_quad / t_field:.1f}x (target >= 50x)")
    print(f"ratio Disk.field / bare loop:  {t_field / t_bare:.2f}x (target <= 2x)")


if __name__ == "__main__":
    main()
