"""The one scenario builder of the test suite: truths drawn from the smoothness prior, sensor
rings with gaps, probes, noisy readings. Every test module that simulates builds from here.

Random streams: each function draws in a fixed order from the ``rng`` it is given, so a test
that calls them in the same order as before reproduces the same numbers.
"""

import numpy as np
from scipy import linalg

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


def health_log(rng, *, n_frames=3000, n_rim=24, sigma=0.05, tau=0.05, time_scale=200.0,
               faults=True, radius=1.0):
    """A SYNTHETIC log of a field drawn from the assimilation model, with seeded sensor faults.

    The coefficients follow the batch runner's dynamics (smoothness prior s = 2 with scale
    ``tau`` as stationary law, time scale ``time_scale`` frames, mean level a random walk
    around 20), 1 s steps; ``n_rim`` rim sensors ``s00...`` and probes ``p0``, ``p1``; noise sd
    ``sigma``. With ``faults``: sensor ``s03`` gains a step offset of 5 sigma at frame
    ``n_frames // 2``, ``s10`` drifts linearly from 0 to 5 sigma over the log, and ``s17``
    throws isolated spikes of +-20 sigma in 0.5 % of the frames.

    Returns
    -------
    dict
        ``t``, ``Y`` (readings), ``ids``, ``points``, ``domain``, ``coef`` (true coefficients
        per frame), ``offset`` (true offsets, n_frames x n_sensors), ``spike`` (bool mask of
        the spiked readings), ``step_frame``.
    """
    from invert import make_domain
    from invert.stages.assimilate.dynamics import CoefficientDynamics

    dom = make_domain(radius)  # the batch runner's domain (truncation for s = 2)
    th = ring_angles(n_rim)
    pts = np.vstack([radius * np.c_[np.cos(th), np.sin(th)], [[0.2, 0.1], [-0.3, -0.25]]])
    ids = [f"s{i:02d}" for i in range(n_rim)] + ["p0", "p1"]
    shape = SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees)
    model = CoefficientDynamics.from_prior(dom.design(pts), np.full(len(pts), sigma**2), shape,
                                           dom.degrees, tau2=tau**2, time_scale=time_scale)
    t = np.arange(n_frames, dtype=float)
    c = np.empty((n_frames, dom.n_coef))
    v0 = np.where(model.random_walk, tau**2, model.prior_var)
    c[0] = np.sqrt(v0) * rng.standard_normal(dom.n_coef)
    c[0, 0] += 20.0
    f, q = model.transition(1.0)
    for k in range(1, n_frames):
        c[k] = f * c[k - 1] + np.sqrt(q) * rng.standard_normal(dom.n_coef)
    Y = c @ model.H.T + sigma * rng.standard_normal((n_frames, len(pts)))
    off = np.zeros_like(Y)
    spike = np.zeros(Y.shape, bool)
    step = n_frames // 2
    if faults:
        off[step:, 3] = 5 * sigma
        off[:, 10] = 5 * sigma * np.arange(n_frames) / (n_frames - 1)
        hit = rng.random(n_frames) < 0.005
        spike[hit, 17] = True
        Y[hit, 17] += 20 * sigma * rng.choice([-1.0, 1.0], hit.sum())
    Y += off
    return {"t": t, "Y": Y, "ids": ids, "points": pts, "domain": dom, "coef": c,
            "offset": off, "spike": spike, "step_frame": step, "model": model}


#: Sensors a seeded health log marks trusted (none of them faulty).
HEALTH_TRUSTED = ("s00", "s06", "s12", "p0", "p1")


def write_health_log(folder, log, *, trusted=False):
    """Write ``log`` (from :func:`health_log`) as ``log.csv`` and ``layout.csv`` in ``folder``;
    with ``trusted`` the layout marks :data:`HEALTH_TRUSTED` in a ``trusted`` column."""
    import pandas as pd

    lay = pd.DataFrame({"sensor": log["ids"], "x": log["points"][:, 0],
                        "y": log["points"][:, 1]})
    if trusted:
        lay["trusted"] = [int(i in HEALTH_TRUSTED) for i in log["ids"]]
    lay.to_csv(folder / "layout.csv", index=False)
    frame = pd.DataFrame(log["Y"], columns=log["ids"])
    frame.insert(0, "time", log["t"])
    frame.to_csv(folder / "log.csv", index=False, float_format="%.10g")
    return folder / "log.csv", folder / "layout.csv"


def stacked_values(model, t, Y):
    """Covariance of the stacked observed values and the values (covariance form).

    The dense joint Gaussian of a linear-Gaussian state-space model with diagonal transitions
    (``model.transition(dt) -> (f, q)``, ``model.H``, ``model.noise_var``, ``model.prior_var``):
    states are sums of independent innovations, readings rows of the stacked design.
    """
    n, p = len(t), model.n_coef
    f = [np.ones(p)] + [model.transition(t[k] - t[k - 1])[0] for k in range(1, n)]
    q = [model.prior_var] + [model.transition(t[k] - t[k - 1])[1] for k in range(1, n)]
    B = np.zeros((n * p, n * p))  # c = B w, w the independent innovations
    for k in range(n):
        phi = np.ones(p)
        for j in range(k, -1, -1):
            B[k * p:(k + 1) * p, j * p:(j + 1) * p] = np.diag(phi)
            phi = phi * f[j]
    Sx = (B * np.concatenate(q)) @ B.T
    rows, yo, rv = [], [], []
    for k in range(n):
        for i in np.flatnonzero(np.isfinite(Y[k])):
            r = np.zeros(n * p)
            r[k * p:(k + 1) * p] = model.H[i]
            rows.append(r)
            yo.append(Y[k, i])
            rv.append(model.noise_var[i])
    Hs = np.array(rows)
    return Hs @ Sx @ Hs.T + np.diag(rv), np.array(yo)


def joint_posterior(dyn, t, Y, rvar=None):
    """Smoothed means and covariance of the stacked states (information form).

    The dense joint Gaussian posterior of a state-space model with diagonal transitions
    (Rauch, Tung & Striebel 1965 give the same moments recursively); readings' variances
    ``rvar`` (n_frames x n_sensors, default ``dyn.noise_var`` for every frame).
    """
    n, p = len(t), dyn.n_coef
    if rvar is None:
        rvar = np.broadcast_to(dyn.noise_var, Y.shape)
    Om = np.zeros((n * p, n * p))
    Om[:p, :p] += np.diag(1.0 / dyn.prior_var)
    for k in range(1, n):
        f, q = dyn.transition(t[k] - t[k - 1])
        a, b = slice(k * p, (k + 1) * p), slice((k - 1) * p, k * p)
        Om[a, a] += np.diag(1.0 / q)
        Om[b, b] += np.diag(f * f / q)
        Om[a, b] -= np.diag(f / q)
        Om[b, a] -= np.diag(f / q)
    rhs = np.zeros(n * p)
    for k in range(n):
        o = np.isfinite(Y[k])
        Ho, w = dyn.H[o], 1.0 / rvar[k, o]
        a = slice(k * p, (k + 1) * p)
        Om[a, a] += (Ho.T * w) @ Ho
        rhs[a] += Ho.T @ (w * Y[k, o])
    cf = linalg.cho_factor(Om)
    return linalg.cho_solve(cf, rhs).reshape(n, p), linalg.cho_solve(cf, np.eye(n * p))
