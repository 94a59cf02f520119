"""Coverage of the assimilation's 90 % intervals against known truth (seeded simulation).

Truth: coefficient paths drawn from the state-space model itself (Ornstein-Uhlenbeck
harmonics with the smoothness prior as stationary law, a random-walk mean level; the exact
transition over each jittered step, as in dynamics.py), readings = H c + Gaussian noise, with
realistic gaps in the data: 3 % of cells blank at random, one sensor out for a stretch, a
whole-ring outage, a logger gap. Under a correct model the smoother's marginals are the exact
posterior (Rauch, Tung & Striebel 1965), so central 90 % intervals of the query values cover
the truth 90 % of the time on average over the simulation.

Tolerance: 200 independent logs x 3 query points; frames within a log are correlated, so the
effective number of independent checks is taken as the number of logs x queries (600, a
conservative count): binomial sd sqrt(0.9 * 0.1 / 600) = 0.012, and the band 0.85-0.95 is
about 4 sd either side.
"""

import numpy as np
import pytest

from invert import make_domain
from invert.prior import SmoothnessPrior
from invert.problem import interval_z
from invert.stages.assimilate import kernel
from invert.stages.assimilate.dynamics import CoefficientDynamics

pytestmark = pytest.mark.slow

N_LOGS, N_FRAMES, T_SCALE, NOISE_SD = 200, 240, 40.0, 0.05


def _model():
    dom = make_domain(0.25, n_modes=6)
    th = np.linspace(0, 2 * np.pi, 12, endpoint=False)
    pts = np.vstack([0.25 * np.c_[np.cos(th), np.sin(th)], [[0.05, 0.0], [-0.08, 0.06]]])
    shape = SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees)
    model = CoefficientDynamics.from_prior(dom.design(pts), np.full(len(pts), NOISE_SD**2),
                                           shape, dom.degrees, tau2=0.5, time_scale=T_SCALE,
                                           mean_var=4.0)
    query = np.array([[0.0, 0.0], [0.2, 0.05], [-0.1, -0.12]])
    return model, dom.design(query)


def _simulate(model, rng):
    """One log: jittered times with a gap, a path of the coefficients, readings with gaps."""
    n, (ns, p) = N_FRAMES, model.H.shape
    dt = 1.0 + rng.uniform(-0.03, 0.03, n)
    dt[n // 2] += 30.0                                   # a logger gap
    t = np.cumsum(dt)
    rw = model.random_walk
    c = np.empty((n, p))
    c[0] = np.sqrt(model.prior_var) * rng.standard_normal(p)
    for k in range(1, n):
        h = t[k] - t[k - 1]
        f = np.where(rw, 1.0, np.exp(-h / T_SCALE))
        q = np.where(rw, 2 * model.drift_var * h / T_SCALE,
                     model.drift_var * (1 - np.exp(-2 * h / T_SCALE)))
        c[k] = f * c[k - 1] + np.sqrt(q) * rng.standard_normal(p)
    Y = c @ model.H.T + NOISE_SD * rng.standard_normal((n, ns))
    Y[rng.random(Y.shape) < 0.03] = np.nan               # single-cell drop-outs
    Y[60:110, 3] = np.nan                                 # one sensor out
    Y[150:170, :12] = np.nan                              # the whole ring out
    return t, Y, c


def test_exact_smoother_90_percent_intervals_cover_90_percent():
    model, Hq = _model()
    rng = np.random.default_rng(20261203)
    z = interval_z(0.9)
    hits, total, after_gap = 0, 0, []
    for _ in range(N_LOGS):
        t, Y, c = _simulate(model, rng)
        out = kernel.smooth_model(model, t, Y, Hq)
        inside = np.abs(c @ Hq.T - out.query_mean) <= z * out.query_sd
        hits += inside.sum()
        total += inside.size
        after_gap.append(inside[150:175].mean())          # during the ring outage
    cover = hits / total
    assert 0.85 <= cover <= 0.95, cover
    # during the outage the intervals widen instead of staying overconfident
    assert 0.80 <= np.mean(after_gap) <= 0.97, np.mean(after_gap)
