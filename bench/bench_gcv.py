"""A GCV fit over 200 lambda values vs scikit-learn's RidgeCV on the same problem.

Both scan 200 values on the same standard-form problem (30 readings, 45 coefficients);
RidgeCV does efficient leave-one-out from one decomposition. Our fit includes the SVD, the
scan, the refinement of the minimum and the posterior covariance. Prints the ratio measured
in this run. Run: python bench/bench_gcv.py
"""

import time

import numpy as np
from sklearn.linear_model import RidgeCV

from invert import LinearProblem, SmoothnessPrior, Tikhonov, make_domain


def timeit(fn, n=50):
    fn()
    t0 = time.perf_counter()
    for _ in range(n):
        fn()
    return (time.perf_counter() - t0) / n


def main():
    rng = np.random.default_rng(1)
    d = make_domain(1.0, s=2.0)
    th = np.linspace(0, 2 * np.pi, 32, endpoint=False)[5:]
    pts = np.vstack([d.from_polar(1.0, th), d.from_polar([0.3, 0.5, 0.7], [0.1, 2.0, 4.0])])
    c = np.sqrt(SmoothnessPrior(2.0).variances(d.eigenvalues, d.degrees).clip(0, 1)) \
        * rng.standard_normal(d.n_coef)
    y = d.design(pts) @ c + 0.05 * rng.standard_normal(len(pts))
    prob = LinearProblem(d.design(pts), y, None, d.degrees, d.eigenvalues, d)
    tk = Tikhonov("gcv", n_grid=200)
    tk.fit(prob)
    dsd = np.sqrt(SmoothnessPrior(2.0).shape(d.eigenvalues, d.degrees))
    A = prob.G * dsd
    grid = tk.grid_
    t_ours = timeit(lambda: Tikhonov("gcv", n_grid=200).fit(prob))
    t_ref = timeit(lambda: RidgeCV(alphas=grid, fit_intercept=False).fit(A, y))
    print(f"problem: {prob.n_readings} readings, {prob.n_coef} coefficients, 200 lambda values")
    print(f"Tikhonov(rule='gcv').fit     {t_ours * 1e3:8.2f} ms (SVD, scan, refine, covariance)")
    print(f"sklearn RidgeCV.fit          {t_ref * 1e3:8.2f} ms (scan only)")
    print(f"ratio ours / RidgeCV: {t_ours / t_ref:.2f} (target <= 1)")


if __name__ == "__main__":
    main()
