r"""Hyperparameters of a batch run: fixed by the user, or estimated once on the log.

The estimate maximises the evidence pooled over a sample of frames that share the most common
drop-out pattern of the first chunk (Bishop 2006, §3.5); it is stored in the manifest so that
a resumed run uses the same values.

References
----------
.. [1] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.5.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError
from ..prior import SmoothnessPrior
from ..problem import LinearProblem
from ..stages._search import grid_then_refine
from ..stages._spectrum import Spectrum
from .statuses import frame_statuses

__all__ = ["pooled_evidence_fit", "hyperparameters"]

#: Tolerance of the bounded Brent refinement in log(lam).
_XATOL = 1e-8


def pooled_evidence_fit(G, Y, sigma, prior_sd, *, n_grid=200):
    r"""Regularisation parameter (and noise sd) maximising the evidence pooled over frames.

    All frames share one design ``G`` (one drop-out pattern). With the standard-form SVD of
    :class:`~invert.stages._spectrum.Spectrum`, frame :math:`j` has
    :math:`q_j(\alpha) = \sum_i \beta_{ij}^2/g_i + r_{\perp j}`, :math:`g_i = 1 + s_i^2/\alpha`;
    the pooled log-evidence is :math:`-\frac12\sum_j (q_j + \log|C|)` with known noise, and with
    one unknown noise level :math:`\hat\sigma^2 = \sum_j q_j/(nm)` profiled out (Bishop 2006,
    §3.5; the per-frame form is :meth:`Spectrum.log_evidence`). The maximum is searched on
    :meth:`Spectrum.alpha_grid` in :math:`\log\alpha`, then refined by bounded Brent
    minimisation between the grid neighbours of the best point (xatol 1e-8).

    Parameters
    ----------
    G : ndarray of shape (m, p)
    Y : ndarray of shape (n, m)
        One frame per row, all readings observed.
    sigma : ndarray of shape (m,) or None
        Known noise sd per reading, or None (one common level, estimated).
    prior_sd : ndarray of shape (p,)
    n_grid : int, default=200

    Returns
    -------
    lam : float
    noise_sd : float or None
        None when ``sigma`` is given.
    """
    G = np.asarray(G, float)
    Y = np.atleast_2d(np.asarray(Y, float))
    n, m = Y.shape
    problem = LinearProblem(G, Y[0], sigma, np.zeros(G.shape[1]), np.zeros(G.shape[1]))
    spec = Spectrum(problem, prior_sd)
    w = problem.weights
    Yt = Y * w[None, :]
    B = spec.U.T @ Yt.T                       # (k, n)
    rperp = np.sum((Yt.T - spec.U @ B) ** 2, axis=0)
    known = sigma is not None

    def score(alpha):
        alpha = np.atleast_1d(alpha)
        g = 1 + spec.s[:, None] ** 2 / alpha[None, :]
        quad = np.einsum("kn,ka->a", B**2, 1 / g) + rperp.sum()
        logdet = np.sum(np.log(g), axis=0)
        if known:
            return -0.5 * (quad + n * logdet)
        return -0.5 * (n * m * np.log(quad / (n * m)) + n * logdet)

    grid = spec.alpha_grid(n_grid)
    la, _ = grid_then_refine(lambda x: -score(np.exp(x))[0], np.log(grid), xatol=_XATOL)
    alpha = float(np.exp(la))
    if known:
        return alpha, None
    g = 1 + spec.s**2 / alpha
    quad = float(np.sum(B**2 / g[:, None]) + rperp.sum())
    return alpha, float(np.sqrt(quad / (n * m)))


def hyperparameters(job, source, manifest):
    """Return the run's ``lam`` and ``noise_sd``: from the manifest, the job, or the log.

    Parameters
    ----------
    job : BatchJob
    source : LogSource
    manifest : dict
        The run's manifest; a value stored there (by an interrupted run) wins. The caller
        stores the result in it.

    Returns
    -------
    dict
        ``lam``, ``noise_sd`` (None with per-sensor sigma) and ``how`` (a sentence).
    """
    if manifest.get("hyper"):
        return manifest["hyper"]
    sigma = job.sigma
    if job.lam is not None:
        return {"lam": float(job.lam),
                "noise_sd": None if sigma is not None else float(job.noise_sd),
                "how": "fixed by the user"}
    first = next(iter(source), None)
    if first is None:
        raise InputError(source.source, "has no frames")
    _, _, acc, _ = frame_statuses(first, -np.inf, min_readings=2)
    Y = first.Y[acc & (np.isfinite(first.Y).sum(1) >= 2)]
    if not len(Y):
        raise InputError(source.source, "no frame in the first chunk has 2 readings; "
                         "give --lam and --noise-sd")
    obs = np.isfinite(Y)
    keys, inv, cnt = np.unique(np.packbits(obs, axis=1), axis=0, return_inverse=True,
                               return_counts=True)
    inv = inv.ravel()
    # most common pattern among those with the most readings seen often enough
    nread = obs[[np.flatnonzero(inv == g)[0] for g in range(len(keys))]].sum(1)
    best = int(np.lexsort((-nread, -cnt))[0])
    rows = np.flatnonzero(inv == best)[: job.calibration_frames]
    idx = np.flatnonzero(obs[rows[0]])
    dom = job.domain
    prior_sd = np.sqrt(SmoothnessPrior(s=job.s).shape(dom.eigenvalues, dom.degrees))
    G = dom.design(job.points[idx])
    lam, nsd = pooled_evidence_fit(G, Y[np.ix_(rows, idx)],
                                   None if sigma is None else sigma[idx], prior_sd)
    return {"lam": lam, "noise_sd": nsd,
            "how": f"pooled evidence (type-II maximum likelihood) over {len(rows)} frames "
                   f"of the first chunk sharing the most common drop-out pattern "
                   f"({idx.size} readings)"}
