"""Truncation rule of a domain, and a one-thread BLAS context for the small stage matrices.

The stages never change the truncation: the assembly layer (:func:`invert.workflow.
problem_for_stage`) sizes it for the roughest smoothness a stage tries, with
:func:`truncation_for`; a stage given too few harmonics warns
(:meth:`invert.problem.LinearProblem.truncation_holds`).
"""

from __future__ import annotations

from ..prior import truncation_degree
from ..problem import truncation_rule

__all__ = ["single_thread", "truncation_for", "truncation_rule"]


def single_thread():
    """Context limiting BLAS to one thread: the matrices here are tiny (tens of rows), and on
    a shared machine multi-threaded BLAS made them 50-80x slower in our measurements."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        from contextlib import nullcontext

        return nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def truncation_for(domain, s_min):
    """Truncation degree that keeps a prior with ``s = s_min`` to the domain's rule.

    The omitted share of prior rim variance stays under the rule's tolerance, up to its
    largest degree (``domain.truncation_rule()``; :func:`invert.prior.truncation_degree`).
    """
    tol, max_degree = truncation_rule(domain)
    return truncation_degree(domain, s_min, tol=tol, maximum=max_degree)
