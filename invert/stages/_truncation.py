"""Truncation degree a domain needs for a given smoothness, by its truncation rule.

The stages never change the truncation: the assembly layer (:func:`invert.workflow.
problem_for_stage`) sizes it for the roughest smoothness a stage tries, with
:func:`truncation_for`; a stage given too few harmonics warns
(:meth:`invert.problem.LinearProblem.truncation_holds`).
"""

from __future__ import annotations

from ..prior import truncation_degree

__all__ = ["truncation_for"]


def truncation_for(domain, s_min):
    """Return the truncation degree keeping a prior with ``s = s_min`` to the rule.

    The omitted share of prior rim variance stays under the rule's tolerance, up to its
    largest degree (``domain.truncation_rule()``; :func:`invert.prior.truncation_degree`).
    """
    tol, max_degree = domain.truncation_rule()
    return truncation_degree(domain, s_min, tol=tol, maximum=max_degree)
