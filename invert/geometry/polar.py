r"""Exact posterior variance of a disk field on polar grids: one short FFT per ring.

Notes
-----
On the disk the design row at :math:`(\rho, \theta)` is
:math:`h = (1, \rho\cos\theta, \rho\sin\theta, \ldots, \rho^N\cos N\theta, \rho^N\sin N\theta)`.
With :math:`\cos n\theta = (e^{in\theta} + e^{-in\theta})/2` and :math:`\sin n\theta =
(e^{in\theta} - e^{-in\theta})/2i`, :math:`h = T_0\,\mathrm{diag}(\rho^{|j|})\,e` with
:math:`e_j = e^{ij\theta}`, :math:`j = -N..N`, and a fixed complex :math:`T_0`. For a
coefficient covariance :math:`\Sigma` and :math:`M = T_0^\top\Sigma T_0`,

.. math:: h^\top\Sigma h = \sum_{q=-2N}^{2N} c_q(\rho)\,e^{iq\theta},\qquad
          c_q(\rho) = \sum_{j+k=q} M_{jk}\,\rho^{|j|+|k|} = \sum_{e} D_{qe}\,\rho^e,

a trigonometric polynomial in :math:`\theta` whose coefficients are band (anti-diagonal) sums
of :math:`M` weighted by powers of :math:`\rho`. At :math:`L` equally spaced angles
:math:`\theta_l = 2\pi l/L` only :math:`q \bmod L` matters, so the variance on a ring is
:math:`L` times the inverse DFT of the folded :math:`c_q` (exact for every :math:`L`, no
aliasing error). The cost is :math:`O(N^2)` per ring plus an FFT of length :math:`L`, against
:math:`O(LN^2)` for design rows.

References
----------
.. [1] A. Zygmund, *Trigonometric Series*, 3rd ed., Cambridge University Press, 2002, ch. X
       (discrete Fourier sums of trigonometric polynomials).
"""

from __future__ import annotations

import numpy as np

__all__ = ["band_table", "ring_variance"]


def band_table(cov, n_modes) -> np.ndarray:
    r"""Table :math:`D_{qe}` of band sums, shape (4N+1, 2N+1) (rows ``q + 2N``, columns ``e``).

    Parameters
    ----------
    cov : ndarray of shape (2N+1, 2N+1)
        Coefficient covariance in the disk's order :math:`(a_0, a_1, b_1, \ldots)`.
    n_modes : int
        :math:`N`.
    """
    N = int(n_modes)
    p = 2 * N + 1
    T0 = np.zeros((p, p), dtype=complex)
    T0[0, N] = 1.0
    n = np.arange(1, N + 1)
    T0[2 * n - 1, N + n] = 0.5
    T0[2 * n - 1, N - n] = 0.5
    T0[2 * n, N + n] = -0.5j
    T0[2 * n, N - n] = 0.5j
    M = T0.T @ np.asarray(cov, float) @ T0
    j = np.arange(-N, N + 1)
    q = (j[:, None] + j[None, :]).ravel() + 2 * N
    e = (np.abs(j)[:, None] + np.abs(j)[None, :]).ravel()
    D = np.zeros((4 * N + 1, 2 * N + 1), dtype=complex)
    np.add.at(D, (q, e), M.ravel())
    return D


def ring_variance(cov, n_modes, rho, n_angles, table=None) -> np.ndarray:
    r"""Exact variance of the field on rings at ``n_angles`` equally spaced angles.

    Parameters
    ----------
    cov : ndarray of shape (2N+1, 2N+1)
        Coefficient covariance.
    n_modes : int
    rho : ndarray of shape (n_rho,)
        Relative radii, ``0 <= rho <= 1``.
    n_angles : int
        Angles :math:`2\pi l/L`, ``l = 0..L-1``.
    table : ndarray, optional
        :func:`band_table` of ``cov`` (reused across calls).

    Returns
    -------
    ndarray of shape (n_rho, n_angles)
    """
    N = int(n_modes)
    D = band_table(cov, N) if table is None else table
    rho = np.asarray(rho, float)
    C = D @ (rho[None, :] ** np.arange(2 * N + 1)[:, None])  # (4N+1, n_rho)
    L = int(n_angles)
    folded = np.zeros((rho.size, L), dtype=complex)
    np.add.at(folded, (slice(None), np.arange(-2 * N, 2 * N + 1) % L), C.T)
    return (np.fft.ifft(folded, axis=1) * L).real
