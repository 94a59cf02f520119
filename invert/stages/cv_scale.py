r"""Cross-validated scale of an averaged posterior: widen when held-out readings say so.

Notes
-----
The averaged posterior (:mod:`invert.stages.averaged`) is calibrated when the field is drawn
from one of its smoothness priors. When it is not (a step along an arc, a source just outside
the rim), the evidence still picks the prior that explains the readings best, but the held-out
readings are predicted worse than the posterior says. This module measures that with
*block* cross-validation and widens the whole posterior covariance by the factor it finds;
it never narrows it.

**Blocks.** Each block is a reading and its ``b - 1`` nearest neighbours (Euclidean, on the
sensor points), so leaving a block out opens a gap of about ``b`` sensor spacings: the case of
an unsensed arc, where the intervals matter most. At most :data:`MAX_BLOCKS` block centres
are used (evenly spread over the readings), so the cost stays independent of dense sensing.

**Closed form.** For one component (smoothness order :math:`s`, ratio :math:`\alpha`) in the
whitened standard form :math:`\tilde y = \tilde A x + e` of :mod:`invert.stages._spectrum`, the
readings have covariance :math:`\nu^2 C`, :math:`C = \tilde A\tilde A^\top/\alpha + I`, and
:math:`C^{-1} = I - H_\alpha` with the hat matrix :math:`H_\alpha = U\,\mathrm{diag}(f)\,U^\top`.
The prediction error of block :math:`B` from the others and its covariance are
(Rasmussen & Williams 2006, §5.4.2, for one reading; the block form is the same Schur
complement)

.. math:: e_B = [(C^{-1})_{BB}]^{-1}(C^{-1}\tilde y)_B,\qquad
          \operatorname{Cov} e_B = \nu^2 [(C^{-1})_{BB}]^{-1},

with :math:`(C^{-1}\tilde y)_B` the whitened residual of the full fit. The averaged posterior
left without :math:`B` re-weights its components by :math:`w_k / p(y_B \mid y_{-B}, k)`
(:math:`p(y_{-B}\mid k) = p(y \mid k) / p(y_B \mid y_{-B}, k)`), so the held-out predictive of
each reading is a mixture; its standardised error is :math:`z = \bar e/\mathrm{sd}` with the
mixture's mean and sd. With the noise level estimated, each component keeps its own estimate
(not re-estimated without the block).

**Scale.** Cross-validation estimates the variance scale of a Gaussian-process model by the
mean of :math:`z^2` (Sundararajan & Keerthi 2001, eq. 14), and under a misspecified covariance
that estimate is the better one (Bachoc 2013). Here :math:`z^2` is winsorised at
:data:`WINSOR` (so that one faulty reading, which the suspect step treats, adds a bounded
amount) and divided by the winsorised mean of :math:`\chi^2_1` (a Huber-type
consistent scale, Huber & Ronchetti 2009, §5.3). The covariance is multiplied by that
factor :math:`\kappa^2` only when it exceeds :math:`1 + 2\sqrt{2/n}` (:math:`n` the number of
distinct readings held out; twice the sd of a mean of :math:`n` independent :math:`\chi^2_1/1`
terms), so readings drawn from the prior leave the posterior unchanged but for a few per cent
of chance excesses.

References
----------
.. [1] S. Sundararajan and S. S. Keerthi, "Predictive approaches for choosing hyperparameters in
       Gaussian processes", Neural Computation 13:1103–1118, 2001.
       doi:10.1162/08997660151134343
.. [2] F. Bachoc, "Cross validation and maximum likelihood estimations of hyper-parameters of
       Gaussian processes with model misspecification", Computational Statistics & Data
       Analysis 66:55–69, 2013. doi:10.1016/j.csda.2013.03.016
.. [3] C. E. Rasmussen and C. K. I. Williams, *Gaussian Processes for Machine Learning*, MIT
       Press, 2006, §5.4.2.
.. [4] P. J. Huber and E. M. Ronchetti, *Robust Statistics*, 2nd ed., Wiley, 2009.
"""

from __future__ import annotations

import numpy as np
from scipy import spatial, stats

from ._spectrum import standard_form

__all__ = ["BLOCK_SIZE", "MAX_BLOCKS", "WINSOR", "block_scale", "held_out"]

#: Readings per held-out block (a reading and its nearest neighbours).
BLOCK_SIZE = 4
#: Most block centres used (evenly spread over the readings).
MAX_BLOCKS = 200
#: Squared standardised errors are winsorised at this value (5 sd): a sharp feature between
#: sensors still counts, one gross fault adds a bounded amount.
WINSOR = 25.0
#: Fewest readings for the check (below it the scale is left at 1).
MIN_READINGS = 8


def _winsorised_chi2_mean(c):
    # E[min(Z^2, c)] for Z ~ N(0, 1): E[Z^2; |Z| < r] + c P(|Z| >= r), r = sqrt(c).
    r = np.sqrt(c)
    inside = stats.chi2.cdf(c, 3)  # E[Z^2 1{Z^2 < c}] = P(chi2_3 < c)
    return float(inside + c * 2 * stats.norm.sf(r))


def _blocks(points, b):
    """Block members, shape (n_blocks, b): evenly spread centres and their neighbours."""
    m = len(points)
    centres = np.unique(np.linspace(0, m - 1, min(m, MAX_BLOCKS)).round().astype(np.intp))
    tree = spatial.cKDTree(points)
    _, idx = tree.query(points[centres], k=b)
    return np.sort(idx, axis=1)


def _block_errors(spec, members, blocks, alphas, nu2):
    """Per component: held-out errors, their variances and log densities of each block.

    Returns arrays of shape (n_alpha, n_blocks, b), (n_alpha, n_blocks, b), (n_alpha, n_blocks).
    """
    problem = spec.problem
    U = standard_form(problem.G[members], problem.weights[members], spec.d) @ (
        spec.Vt.T / spec.s)
    yt = spec.ytilde[members]
    pos = np.searchsorted(members, blocks)  # rows of U for each block member
    f = spec.filter_factors(alphas)  # (k, n_alpha)
    resid = yt[:, None] - U @ (f * spec.beta[:, None])  # (n_members, n_alpha)
    Ub = U[pos]  # (n_blocks, b, k)
    Hbb = np.einsum("nik,ka,njk->anij", Ub, f, Ub)
    Cinv = np.eye(blocks.shape[1]) - Hbb
    r = np.moveaxis(resid[pos], -1, 0)  # (n_alpha, n_blocks, b)
    e = np.linalg.solve(Cinv, r[..., None])[..., 0]
    inv = np.linalg.inv(Cinv)
    var = nu2[:, None, None] * np.diagonal(inv, axis1=-2, axis2=-1)
    sign, logdet_cinv = np.linalg.slogdet(Cinv)
    b = blocks.shape[1]
    quad = np.einsum("anb,anb->an", r, e) / nu2[:, None]
    logp = -0.5 * (quad + b * np.log(nu2)[:, None] - logdet_cinv + b * np.log(2 * np.pi))
    logp = np.where(sign > 0, logp, -np.inf)
    return e, var, logp


def held_out(rows, weights, blocks):
    r"""Held-out predictive error and sd of each block member under the averaged posterior.

    Parameters
    ----------
    rows, weights
        As :func:`block_scale`.
    blocks : ndarray of int, shape (n_blocks, b)
        Sorted reading indices of each block.

    Returns
    -------
    error, sd : ndarray of shape (n_blocks, b)
        :math:`y_j - E[y_j \mid y_{-B}]` and the predictive sd of :math:`y_j` given
        :math:`y_{-B}` (noise included), both in whitened units (divided by the reading's
        sigma when given), under the mixture re-weighted without the block.
    """
    members = np.unique(blocks)
    parts = []
    for (s, spec, alphas, logev, nu2, df, tau), w in zip(rows, weights):
        keep = np.flatnonzero(w > 0)
        if keep.size == 0:
            continue
        with np.errstate(all="ignore"):
            e, var, logp = _block_errors(spec, members, blocks, alphas[keep], nu2[keep])
        parts.append((np.log(w[keep]), e, var, logp))
    logw = np.concatenate([p[0] for p in parts])[:, None] - np.concatenate(
        [p[3] for p in parts])  # (n_comp, n_blocks): w_k / p(y_B | y_-B, k)
    E = np.concatenate([p[1] for p in parts])
    V = np.concatenate([p[2] for p in parts])
    ok = np.isfinite(logw) & np.isfinite(E).all(axis=-1) & np.isfinite(V).all(axis=-1)
    logw = np.where(ok, logw, -np.inf)
    wb = np.exp(logw - logw.max(axis=0))
    wb /= wb.sum(axis=0)
    E, V = np.where(ok[..., None], E, 0.0), np.where(ok[..., None], V, 0.0)
    mean_e = np.einsum("cn,cnb->nb", wb, E)
    second = np.einsum("cn,cnb->nb", wb, V + E**2)
    return mean_e, np.sqrt(np.maximum(second - mean_e**2, np.finfo(float).tiny))


def block_scale(problem, rows, weights):
    r"""Cross-validated variance factor of an averaged posterior (module Notes).

    Parameters
    ----------
    problem : LinearProblem
        With its sensor ``points``.
    rows : list
        The averaged stage's components per ``s``: ``(s, spec, alphas, logev, nu2, df, tau)``.
    weights : list of ndarray
        Normalised component weights, one array per row (zero: dropped).

    Returns
    -------
    dict
        ``factor`` (the multiplier of the covariance, 1 when not widened), ``mean_z2`` (the
        winsorised, consistency-corrected mean of the squared held-out errors), ``threshold``,
        ``block``, ``n_blocks``, ``n_held_out``; ``None`` when the check does not apply (no
        sensor points, fewer than :data:`MIN_READINGS` readings).
    """
    points = problem.points
    m = problem.n_readings
    if points is None or m < MIN_READINGS:
        return None
    b = min(BLOCK_SIZE, m // 4)
    blocks = _blocks(np.asarray(points, float), b)
    members = np.unique(blocks)
    err, sd = held_out(rows, weights, blocks)
    z2 = (err / sd) ** 2
    mean_z2 = float(np.mean(np.minimum(z2, WINSOR)) / _winsorised_chi2_mean(WINSOR))
    n = members.size
    threshold = 1.0 + 2.0 * np.sqrt(2.0 / n)
    return {"factor": mean_z2 if mean_z2 > threshold else 1.0, "mean_z2": mean_z2,
            "threshold": float(threshold), "block": int(b), "n_blocks": int(len(blocks)),
            "n_held_out": int(n),
            "method": f"blocks of {b} nearest readings held out in turn (closed form); the "
                      f"covariance is multiplied by the winsorised mean of the squared "
                      f"held-out errors when it exceeds the threshold, never narrowed"}
