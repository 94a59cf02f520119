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
from scipy import stats

from ..errors import InputError
from ..prior import SmoothnessPrior
from ..problem import LinearProblem
from ..stages._search import grid_then_refine
from ..stages._spectrum import Spectrum
from ..stages.robust import RANGE_LIMIT
from .statuses import frame_statuses

__all__ = ["pooled_evidence_fit", "robust_pooled_fit", "hyperparameters"]

#: Tolerance of the bounded Brent refinement in log(lam).
_XATOL = 1e-8


class _Pooled:
    """The standard-form pieces of frames sharing one design (see :func:`pooled_evidence_fit`)."""

    def __init__(self, G, Y, sigma, prior_sd):
        G = np.asarray(G, float)
        self.Y = np.atleast_2d(np.asarray(Y, float))
        self.n, self.m = self.Y.shape
        problem = LinearProblem(G, self.Y[0], sigma, np.zeros(G.shape[1]), np.zeros(G.shape[1]))
        self.spec = Spectrum(problem, prior_sd)
        Yt = self.Y * problem.weights[None, :]
        self.B = self.spec.U.T @ Yt.T                       # (k, n)
        self.rperp = np.sum((Yt.T - self.spec.U @ self.B) ** 2, axis=0)
        self.known = sigma is not None

    def quads(self, alpha, rows=slice(None)):
        r"""Quadratic forms :math:`q_j(\alpha)` of the frames ``rows``, and the log-determinant."""
        g = 1 + self.spec.s[:, None] ** 2 / np.atleast_1d(alpha)[None, :]
        return (np.einsum("kn,ka->an", self.B[:, rows] ** 2, 1 / g)
                + self.rperp[rows][None, :]), np.sum(np.log(g), axis=0)

    def fit(self, rows, n_grid):
        """Maximise the pooled evidence over the frames ``rows`` (bool mask)."""
        n, m, known = int(rows.sum()), self.m, self.known
        # all frames: the arrays as they are (a gathered copy sums in another order)
        B, rperp = (self.B, self.rperp) if rows.all() else (self.B[:, rows], self.rperp[rows])
        B2, rsum = B**2, rperp.sum()

        def score(alpha):
            alpha = np.atleast_1d(alpha)
            g = 1 + self.spec.s[:, None] ** 2 / alpha[None, :]
            quad = np.einsum("kn,ka->a", B2, 1 / g) + rsum
            logdet = np.sum(np.log(g), axis=0)
            if known:
                return -0.5 * (quad + n * logdet)
            return -0.5 * (n * m * np.log(quad / (n * m)) + n * logdet)

        grid = self.spec.alpha_grid(n_grid)
        la, _ = grid_then_refine(lambda x: -score(np.exp(x))[0], np.log(grid), xatol=_XATOL)
        alpha = float(np.exp(la))
        if known:
            return alpha, None
        g = 1 + self.spec.s**2 / alpha
        quad = float(np.sum(B2 / g[:, None]) + rsum)
        return alpha, float(np.sqrt(quad / (n * m)))


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
    pool = _Pooled(G, Y, sigma, prior_sd)
    return pool.fit(np.ones(pool.n, bool), n_grid)


def _clean_start(Y, sigma):
    """Frames with no cell beyond RANGE_LIMIT robust sd of its sensor's median over frames."""
    med = np.median(Y, axis=0)
    scale = 1.4826 * np.median(np.abs(Y - med), axis=0)
    scale = scale + (np.median(sigma) if sigma is not None else 1e-12 * (1 + np.abs(med)))
    ok = ~np.any(np.abs(Y - med) > RANGE_LIMIT * scale, axis=1)
    return ok if ok.sum() * 2 >= len(Y) else np.ones(len(Y), bool)


def robust_pooled_fit(G, Y, sigma, prior_sd, *, n_grid=200, level=1e-3, max_iter=5):
    r"""Pooled evidence fit on the frames the model does not reject (gross cells ignored).

    Under the model a frame's whitened quadratic form is :math:`q_j/\sigma^2 \sim \chi^2_m`
    (:math:`y_j \sim N(0, \sigma^2 C)`; Bishop 2006, §3.5). A frame beyond the
    :math:`1 - \mathrm{level}/n` quantile (Bonferroni over the ``n`` frames, so that a clean
    sample loses a frame with probability below ``level``) is left out and the fit repeated
    until the set of frames repeats. The start leaves out frames with a cell more than
    :data:`~invert.stages.robust.RANGE_LIMIT` robust sd (1.4826 MAD over frames) from its
    sensor's median: one -9999 sentinel otherwise inflates the pooled noise level so much that
    no frame is rejected.

    Returns
    -------
    lam : float
    noise_sd : float or None
    kept : ndarray of bool, shape (n,)
        Frames the hyperparameters were estimated on.
    """
    pool = _Pooled(G, Y, sigma, prior_sd)
    keep = _clean_start(pool.Y, sigma)
    limit = stats.chi2.isf(level / pool.n, pool.m)
    seen = set()
    lam, nsd = pool.fit(keep, n_grid)
    for _ in range(max_iter):
        seen.add(keep.tobytes())
        q = pool.quads(lam)[0][0] / (1.0 if nsd is None else nsd**2)
        new = q <= limit
        if new.sum() * 2 < pool.n or new.tobytes() in seen:
            break
        keep = new
        lam, nsd = pool.fit(keep, n_grid)
    return lam, nsd, keep


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
    lam, nsd, kept = robust_pooled_fit(G, Y[np.ix_(rows, idx)],
                                       None if sigma is None else sigma[idx], prior_sd)
    left = int(len(rows) - kept.sum())
    return {"lam": lam, "noise_sd": nsd,
            "how": f"pooled evidence (type-II maximum likelihood) over {int(kept.sum())} frames "
                   f"of the first chunk sharing the most common drop-out pattern "
                   f"({idx.size} readings)" + (
                       f"; {left} frame(s) the model rejects (chi-square of the frame beyond "
                       f"its 1 - 0.001/{len(rows)} quantile: a gross cell?) were left out"
                       if left else "")}
