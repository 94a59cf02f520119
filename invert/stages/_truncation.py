"""Truncation helpers shared by the Gaussian and MCMC stages, and a one-thread BLAS context."""

from __future__ import annotations

import numpy as np

from ..prior import truncation_degree


def single_thread():
    """Context limiting BLAS to one thread: the matrices here are tiny (tens of rows), and on
    a shared machine multi-threaded BLAS made them 50-80x slower in our measurements."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        from contextlib import nullcontext

        return nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def _truncation_rule(domain):
    """``(tol, max_degree)`` used to extend a domain's truncation: the disk keeps under 1e-4 of
    the prior rim variance (invert.prior.truncation_degree) up to degree 128; the ball uses
    its own, looser rule (invert.geometry.ball.BALL_TRUNCATION_TOL, BALL_MAX_DEGREE) because its
    column count grows as (N+1)^2."""
    if getattr(domain, "kind", "disk") == "ball":
        from ..geometry.ball import BALL_MAX_DEGREE, BALL_TRUNCATION_TOL

        return BALL_TRUNCATION_TOL, BALL_MAX_DEGREE
    return 1e-4, 128


def extend_modes(problem, s_min, *, tol=None):
    """Raise the truncation degree so that a prior with ``s = s_min`` loses < ``tol`` of its
    rim variance (see :func:`invert.prior.truncation_degree`).

    Returns ``(problem, note)``; ``note`` is None when nothing changed. The problem is rebuilt
    from ``problem.points`` with ``problem.domain.with_modes``; this is done only when the
    rebuilt design reproduces the given ``G`` in its first columns (1e-10, algebra), so a
    hand-made design is never replaced.
    """
    dom = problem.domain
    if dom is None or problem.points is None or not hasattr(dom, "with_modes"):
        return problem, None
    rule_tol, max_n = _truncation_rule(dom)
    tol = rule_tol if tol is None else tol
    need = truncation_degree(dom, s_min, tol=tol, maximum=max_n)
    if need <= getattr(dom, "n_modes", need):
        return problem, None
    new_dom = dom.with_modes(need)
    G = new_dom.design(problem.points)
    p = problem.n_coef
    if p > G.shape[1] or not np.allclose(G[:, :p], problem.G, rtol=1e-10, atol=1e-10):
        return problem, None
    from ..problem import LinearProblem

    new = LinearProblem(G, problem.y, problem.sigma, new_dom.degrees, new_dom.eigenvalues,
                        new_dom, problem.sensor, problem.points, problem.gap_sensor,
                        problem.gap_points, problem.notes)
    note = (f"harmonics raised from {dom.n_modes} to {need} so that the roughest smoothness "
            f"considered (s = {s_min:g}) is not truncated")
    return new, note


def truncation_floor(problem, s_lo, s_hi, *, tol=None):
    """Smallest ``s`` in ``[s_lo, s_hi]`` whose prior the problem's truncation degree holds to
    ``tol`` (bisection on the monotone :func:`invert.prior.truncation_degree`)."""
    dom = problem.domain
    if dom is None or not hasattr(dom, "n_modes"):
        return s_lo
    N = dom.n_modes
    tol = _truncation_rule(dom)[0] if tol is None else tol
    if truncation_degree(dom, s_lo, tol=tol) <= N:
        return s_lo
    lo, hi = s_lo, s_hi
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        if truncation_degree(dom, mid, tol=tol) <= N:
            hi = mid
        else:
            lo = mid
    return hi
