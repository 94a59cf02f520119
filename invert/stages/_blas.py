"""A one-thread BLAS context for the small matrices of the stages."""

from __future__ import annotations

__all__ = ["single_thread"]


def single_thread():
    """Limit BLAS to one thread (a context manager).

    Context limiting BLAS to one thread: the matrices here are tiny (tens of rows), and on
    a shared machine multi-threaded BLAS made them 50-80x slower in our measurements.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        from contextlib import nullcontext

        return nullcontext()
    return threadpool_limits(limits=1, user_api="blas")
