"""The one scenario builder of the test suite: truths drawn from the smoothness prior, sensor
rings with gaps, probes, noisy readings. Every test module that simulates builds from here.

Random streams: each function draws in a fixed order from the ``rng`` it is given, so a test
that calls them in the same order as before reproduces the same numbers.
"""

import numpy as np

from invert import LinearProblem, SmoothnessPrior


def prior_coefficients(rng, domain, *, s=2.0, tau=1.0, mean=20.0, mean_sd=1.0):
    """Coefficients drawn from the smoothness prior ``tau^2 (1+lambda_n)^(-s)``.

    The mean level is ``mean + mean_sd * z`` (``mean_sd=0`` fixes it at ``mean``); one call of
    ``rng.standard_normal(domain.n_coef)``.
    """
    v = SmoothnessPrior(s=s, tau=tau).variances(domain.eigenvalues, domain.degrees)
    v[0] = mean_sd**2
    c = np.sqrt(v) * rng.standard_normal(domain.n_coef)
    c[0] += mean
    return c


def ring_angles(n, *, offset=0.0):
    """``n`` equally spaced angles from ``offset`` (radians)."""
    return np.linspace(0, 2 * np.pi, n, endpoint=False) + offset


def outside_gap(theta, start, gap):
    """Mask of the angles outside the ccw arc of ``gap`` turns (fraction of 2 pi) from ``start``."""
    return np.mod(theta - start, 2 * np.pi) >= 2 * np.pi * gap


def noisy_problem(rng, domain, points, c, sigma, *, known=True, sensor=None):
    """Readings ``G c + sigma * z`` at ``points`` as a LinearProblem (``sigma`` hidden unless
    ``known``); one call of ``rng.standard_normal(len(points))``."""
    G = domain.design(points)
    y = G @ c + sigma * rng.standard_normal(len(points))
    return LinearProblem(G, y, np.full(len(points), sigma) if known else None, domain.degrees,
                         domain.eigenvalues, domain, sensor=sensor, points=points)


def write_ring_layout(path, n_sensors):
    """Write LAYOUT.csv of ``n_sensors`` sensors ``s0, s1, ...`` evenly on the unit circle."""
    th = np.linspace(0, 2 * np.pi, n_sensors, endpoint=False)
    path.write_text("sensor,x,y\n" + "".join(f"s{i},{np.cos(t):.12f},{np.sin(t):.12f}\n"
                                             for i, t in enumerate(th)))
    return path


def annulus_laplace_fd(a, b, fo, fi, n_r, n_t):
    """Finite-difference Laplace solve on the annulus a <= r <= b (rim functions fo, fi)."""
    # Second-order finite differences of Laplace's equation in polar coordinates,
    # u_rr + u_r / r + u_tt / r^2 = 0, on n_r radii from a to b (Dirichlet values fi, fo at the
    # ends) and n_t periodic angles; one sparse solve (scipy.sparse.linalg.spsolve).
    r = np.linspace(a, b, n_r)
    t = 2 * np.pi * np.arange(n_t) / n_t
    hr, ht = r[1] - r[0], t[1] - t[0]
    m = n_r - 2
    idx = np.arange(m * n_t).reshape(m, n_t)
    rows, cols, vals = [], [], []
    rhs = np.zeros(m * n_t)
    for i in range(m):
        ri = r[i + 1]
        lo, hi = 1 / hr**2 - 1 / (2 * ri * hr), 1 / hr**2 + 1 / (2 * ri * hr)
        ang = 1 / (ri * ht) ** 2
        for j in range(n_t):
            k = idx[i, j]
            rows += [k, k, k]
            cols += [k, idx[i, (j + 1) % n_t], idx[i, (j - 1) % n_t]]
            vals += [-2 / hr**2 - 2 * ang, ang, ang]
            for nb, coef, edge in ((i - 1, lo, fi(t[j])), (i + 1, hi, fo(t[j]))):
                if 0 <= nb < m:
                    rows.append(k)
                    cols.append(idx[nb, j])
                    vals.append(coef)
                else:
                    rhs[k] -= coef * edge
    from scipy import sparse
    from scipy.sparse.linalg import spsolve

    A = sparse.csr_matrix((vals, (rows, cols)), shape=(m * n_t, m * n_t))
    return r[1:-1], t, spsolve(A, rhs).reshape(m, n_t)
