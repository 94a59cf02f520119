"""Grid evaluation speed: Horner's rule vs trapezoid Poisson-integral quadrature.

501 x 501 grid over the disk (points inside only), 64 harmonics. Prints the time of
  - Disk.field (Horner's rule in w = (z - c)/R),
  - a bare numpy complex Horner loop written here (the floor for this approach),
  - a 512-node trapezoid quadrature of the Poisson integral of the same rim function,
  - the posterior sd map on the same grid: the former computation (design by a cumulative
    complex product, then sum((H R)**2)), kept here as the baseline, and Estimate.at now,
  - the exact Cartesian map (mean, sd, interval) on the same grid by Estimate.grid_map (one
    canonical point per eight mirror images, geometry/cartesian.py), against the mean map in
    the same run, with 64 harmonics and with the default 22, and its largest relative sd
    difference from Estimate.at,
  - the sd map on a polar grid of about as many points (251 rings x 785 angles) by one FFT
    per ring (Estimate.polar_map), against the mean map (Disk.field) on the same points,
  - intervals at 1e6 random query points (Estimate.at) against their means (Estimate.values),
    with the default truncation (22 harmonics) and with 64,
with ratios measured in this run, the largest differences from the former computation, and
the largest difference between Horner and quadrature where rho <= 0.9 (the quadrature is
inaccurate near the rim). Run: python bench/bench_grid.py
"""

import time

import numpy as np
from scipy import linalg

from invert import Disk, LinearProblem, Tikhonov, poisson_kernel


def old_sd(est, P, block=8192):
    """Return the sd map as computed before: cumulative complex powers, then sum((H R)**2)."""
    d, out = est.domain, np.empty(len(P))
    w_, V = linalg.eigh(est.cov)
    root = V * np.sqrt(np.clip(w_, 0, None))  # as Estimate forms it
    for s in range(0, len(P), block):
        w = (P[s:s + block, 0] + 1j * P[s:s + block, 1]) / d.radius
        H = np.empty((w.size, d.n_coef))
        H[:, 0] = 1.0
        pw = np.cumprod(np.broadcast_to(w[:, None], (w.size, d.n_modes)), axis=1)
        H[:, 1::2], H[:, 2::2] = pw.real, pw.imag
        out[s:s + block] = np.sqrt(np.sum((H @ root) ** 2, axis=1))
    return out


def fitted(n_modes, c=None):
    """Return a fixed-lam fit to 20 rim sensors with a 4-sensor gap (SYNTHETIC)."""
    d = Disk(1.0, (0.0, 0.0), n_modes)
    if c is None:
        c = np.random.default_rng(0).standard_normal(d.n_coef) / (1 + d.degrees) ** 2
    th_s = np.linspace(0, 2 * np.pi, 24, endpoint=False)[4:]
    sp = d.from_polar(1.0, th_s)
    prob = LinearProblem(d.design(sp), d.design(sp) @ c, np.full(len(sp), 0.05), d.degrees,
                         d.eigenvalues, d)
    return Tikhonov("fixed", lam=0.05**2).fit(prob)


def grid_maps(xs, ys, P, inside):
    """Print the Cartesian grid-map timings against the mean map, 64 and 22 harmonics."""
    for n_modes in (64, 22):
        e = fitted(n_modes)
        t_m, _ = best_of(lambda e=e: e.domain.field(e.mean, P), repeat=5)
        t_g, g = best_of(lambda e=e: e.grid_map(xs, ys), repeat=5)
        ref = e.at(P)
        rel = np.max(np.abs(g.sd.ravel()[inside] - ref.sd) / ref.sd)
        print(f"grid_map (mean, sd, interval), {n_modes} harmonics: {t_g * 1e3:.1f} ms, mean "
              f"map {t_m * 1e3:.1f} ms, ratio {t_g / t_m:.2f}x (target <= 2x); max relative "
              f"|sd - Estimate.at| {rel:.1e}")


def sd_maps(t_field, P):
    """Print the sd-map timings and differences (Cartesian, polar, 1e6 query points)."""
    est = fitted(64)
    t_old, sd_old = best_of(lambda: old_sd(est, P), repeat=1)
    t_sd, s_new = best_of(lambda: est.at(P), repeat=2)
    print(f"sd map, former computation   {t_old * 1e3:9.1f} ms")
    print(f"sd map (Estimate.at)         {t_sd * 1e3:9.1f} ms   max |new - former| "
          f"{np.max(np.abs(s_new.sd - sd_old)):.1e} (sd up to {sd_old.max():.2g})")
    print(f"ratio Cartesian sd map (Estimate.at) / mean map: {t_sd / t_field:.1f}x (former "
          f"{t_old / t_field:.1f}x; target <= 2x)")
    rho, L = np.linspace(0.0, 1.0, 251), 785
    Q = est.domain.polar_grid(rho, L)
    t_pm, _ = best_of(lambda: est.domain.field(est.mean, Q))
    t_pol, pol = best_of(lambda: est.polar_map(rho, L))
    ref = old_sd(est, Q)
    print(f"polar grid {len(rho)} x {L} = {len(Q)} points: mean map {t_pm * 1e3:.1f} ms, "
          f"polar_map (mean, sd, interval) {t_pol * 1e3:.1f} ms, ratio {t_pol / t_pm:.2f}x "
          f"(target <= 2x); max |new - former| {np.max(np.abs(pol.sd - ref)):.1e}, relative "
          f"{np.max(np.abs(pol.sd - ref) / ref):.1e}")
    rng = np.random.default_rng(1)
    pts = Disk().from_polar(np.sqrt(rng.random(1_000_000)), rng.uniform(0, 2 * np.pi, 1_000_000))
    for n_modes in (22, 64):
        e = fitted(n_modes)
        t_m, _ = best_of(lambda e=e: e.values(pts), repeat=2)
        t_i, s_i = best_of(lambda e=e: e.at(pts), repeat=2)
        t_o, s_o = best_of(lambda e=e: old_sd(e, pts), repeat=1)
        print(f"1e6 query points, {n_modes} harmonics: means {t_m * 1e3:.0f} ms, intervals "
              f"{t_i * 1e3:.0f} ms, ratio {t_i / t_m:.2f}x (former {t_o / t_m:.2f}x; target "
              f"<= 3x); max |new - former| sd {np.max(np.abs(s_i.sd - s_o)):.1e}")


def best_of(fn, repeat=3):
    """Return the best time of ``repeat`` runs and the last result."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main():
    """Print the timings, ratios and differences."""
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


    core = r <= 0.9
    print(f"grid 501x501, {len(P)} points inside, {d.n_modes} harmonics")
    print(f"Disk.field (Horner)          {t_field * 1e3:9.1f} ms")
    print(f"bare numpy Horner loop       {t_bare * 1e3:9.1f} ms")
    print(f"512-node trapezoid quadrature{t_quad * 1e3:9.1f} ms")
    print(f"max |Horner - quadrature| where rho <= 0.9: {np.max(np.abs(u - u_quad)[core]):.2e}")
    print(f"max |Horner - bare loop|: {np.max(np.abs(u - u_bare)):.2e}")
    print(f"ratio quadrature / Disk.field: {t_quad / t_field:.1f}x (target >= 50x)")
    print(f"ratio Disk.field / bare loop:  {t_field / t_bare:.2f}x (target <= 2x)")
    sd_maps(t_field, P)
    grid_maps(xs, ys, P, inside)


if __name__ == "__main__":
    main()
