r"""Linear recursions evaluated for a whole run of frames at once (the steady-state shortcut).

Notes
-----
While the drop-out pattern and the time step stay the same the Riccati recursion converges;
once frozen, the means follow :math:`x_k = \Phi x_{k-1} + u_k`, evaluated for the whole run in
the eigenbasis of :math:`\Phi` with :func:`scipy.signal.lfilter` (a first-order recursive
filter per component).
"""

from __future__ import annotations

import numpy as np
from scipy import signal

__all__ = ["linear_recursion", "close_relative"]


def linear_recursion(Phi, U, x0, *, reverse=False, B=None):
    r"""Evaluate :math:`x_k = \Phi x_{k-1} + u_k` for all rows of ``U`` starting from ``x0``.

    With ``B`` the inputs are :math:`u_k = B\,U_k` (``U`` holds the raw rows). Uses the
    eigenbasis of :math:`\Phi` and a first-order recursive filter per component
    (:func:`scipy.signal.lfilter`) when the eigenvalues are real and the eigenvectors well
    conditioned, else a plain loop. With ``reverse`` the recursion runs from the last row to
    the first.
    """
    L = U.shape[0]
    if reverse:
        return linear_recursion(Phi, U[::-1], x0, B=B)[::-1]
    if L == 0:
        return np.empty((0, Phi.shape[0]))
    if L > 64:
        lam, V = np.linalg.eig(Phi)
        if np.all(np.abs(lam.imag) <= 1e-12 * (1 + np.abs(lam.real))):
            lam, V = lam.real, V.real
            Vi = None
            try:
                if np.linalg.cond(V) < 1e6:
                    Vi = np.linalg.inv(V)
            except np.linalg.LinAlgError:
                Vi = None
            if Vi is not None:
                W = (Vi if B is None else Vi @ B) @ U.T  # (p, L) inputs in the eigenbasis
                z0 = Vi @ x0
                for i in range(W.shape[0]):
                    W[i] = signal.lfilter([1.0], [1.0, -lam[i]], W[i], zi=[lam[i] * z0[i]])[0]
                return (V @ W).T
    if B is not None:
        U = U @ B.T
    X = np.empty_like(U)
    x = np.asarray(x0, float)
    for k in range(L):
        x = Phi @ x + U[k]
        X[k] = x
    return X


def close_relative(a, b, tol):
    """Whether ``max|a - b| <= tol * max|a|`` (relative change of a matrix)."""
    return np.max(np.abs(a - b)) <= tol * max(np.max(np.abs(a)), 1e-300)
