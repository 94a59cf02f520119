"""Every diagnostic of one fit, assembled: :class:`Diagnostics` and :func:`diagnose`.

The pieces live in one module each: :mod:`~invert.diagnostics.depth` (attenuation, resolution,
resolved degree, radial sd), :mod:`~invert.diagnostics.gaps` (unsensed arcs, dependence on
them), :mod:`~invert.diagnostics.exceedance` and :mod:`~invert.diagnostics.model_check`. Their
public names are re-exported here, so ``from invert.diagnostics.diagnose import ...`` keeps
working. Which diagnostics run is decided by asking the domain (``rim_arcs``), never its kind.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import ModelCheckWarning
from ._common import prior_params
from .depth import (
    RadialProfile,
    Resolution,
    attenuation,
    prior_variances,
    radial_sd_profile,
    resolution,
    resolved_degree,
)
from .exceedance import MaxExceedance, exceedance_probability, max_exceedance
from .gaps import GapDependence, gap_dependence, half_mass_width, unsensed_arcs
from .model_check import CHECK_ALPHA, ModelCheck, model_check, psis_loo
from .rims import RimDiagnostics, rim_diagnostics

__all__ = [
    "Resolution",
    "RadialProfile",
    "GapDependence",
    "MaxExceedance",
    "ModelCheck",
    "Diagnostics",
    "RimDiagnostics",
    "CHECK_ALPHA",
    "attenuation",
    "prior_variances",
    "resolution",
    "resolved_degree",
    "radial_sd_profile",
    "unsensed_arcs",
    "gap_dependence",
    "half_mass_width",
    "exceedance_probability",
    "max_exceedance",
    "model_check",
    "psis_loo",
    "diagnose",
]


@dataclass(frozen=True)
class Diagnostics:
    """All diagnostics of one fit, as used by the report and ``summary.json``."""

    resolution: Resolution | None
    resolved_degree_at: dict
    radial: RadialProfile | None
    gaps: GapDependence | None
    check: ModelCheck | None
    max_exceed: MaxExceedance | None
    threshold: float | None
    warnings: tuple = ()
    gap_labels: tuple = ()
    rims: RimDiagnostics | None = None

    def to_dict(self) -> dict:
        """Return the ``diagnostics`` block of ``summary.json``."""
        out = {}
        if self.check is not None:
            out["model_check"] = self.check.to_dict()
        if self.resolution is not None:
            r = self.resolution
            out["depth"] = {
                "effective_dof": r.effective_dof,
                "variance_ratio_by_degree": r.variance_ratio.tolist(),
            }
            if self.resolved_degree_at:
                out["depth"]["resolved_degree_at_relative_radius"] = self.resolved_degree_at
        if self.radial is not None:
            out.setdefault("depth", {})["posterior_sd_rms_at_relative_radius"] = {
                f"{rr:.2f}": float(v) for rr, v in zip(self.radial.rho[::10],
                                                       self.radial.rms_sd[::10])}
        if self.gaps is not None:
            out["gaps"] = {
                "unsensed_arcs_deg": np.rad2deg(self.gaps.arcs).tolist(),
                "share_at_centre": float(self.gaps.centre_share),
                "points": [
                    {"label": lab, "x": float(p[0]), "y": float(p[1]), "share": float(sh),
                     "half_mass_arc_deg": float(w)}
                    for lab, p, sh, w in zip(self.gap_labels, self.gaps.points,
                                             self.gaps.share, self.gaps.half_mass_width_deg)],
                "definition": "share: Poisson-kernel mass over rim arcs farther than half a "
                              "sensor spacing from any working rim sensor; half_mass_arc_deg: "
                              "width of the rim arc below the point holding half its kernel "
                              "mass",
            }
        if self.rims is not None:
            by_rim = self.rims.to_dict()
            out.setdefault("depth", {})["by_rim"] = by_rim["depth"]
            out["depth"]["resolved_degree_definition"] = (
                "highest degree of the rim's function that a ring of all the sensors, at the "
                "given fraction of the wall away from that rim, resolves (data precision above "
                "prior precision)")
            out["gaps"] = {"by_rim": by_rim["gaps"], "definition": (
                "unsensed arcs: arcs of each rim farther than half that rim's sensor spacing "
                "from its working sensors (the whole rim when it has none); share_at_points: "
                "harmonic measure of those arcs, the share of the value at the point that "
                "comes from them")}
        if self.max_exceed is not None:
            e = self.max_exceed
            out["exceedance"] = {
                "threshold": e.threshold,
                "probability_max_exceeds": e.probability,
                "mc_se": e.mc_se,
                "n_draws": e.n_draws,
                "max_median": e.max_median,
                "max_interval": [e.max_lower, e.max_upper],
                "method": "posterior draws, maximum over a fine rim grid (maximum principle)",
            }
        return out


def _gap_points(domain, rim, query, labels):
    # The centre and the query points (without repeating the centre), with their labels.
    pts, names = rim.ring(0.0, 0.0), ["centre"]
    if query is not None and len(query):
        q = np.asarray(query, float)
        qn = [str(x) for x in labels] if labels is not None else \
            [f"p{k + 1}" for k in range(len(q))]
        if np.any(np.hypot(*(q - pts).T) < 1e-9 * domain.radius):
            return q, qn  # the user already asks about the centre
        return np.vstack([pts, q]), names + qn
    return pts, names


def _reference_and_query(domain, query, labels):
    # The domain's reference points and the query points, with their labels.
    ref = domain.reference_points()
    pts, names = [np.asarray(p, float) for _, p in ref], [n for n, _ in ref]
    if query is not None and len(query):
        q = np.asarray(query, float)
        pts += list(q)
        names += [str(x) for x in labels] if labels is not None else \
            [f"p{k + 1}" for k in range(len(q))]
    return np.array(pts), names


def diagnose(estimate, problem, *, level=0.9, threshold=None, query=None, labels=None,
             rng=None) -> Diagnostics:
    """Compute every diagnostic of a fit that the domain supports.

    Parameters
    ----------
    estimate : Estimate
    problem : LinearProblem
    level : float, default=0.9
        Level of the interval of the maximum (with ``threshold``).
    threshold : float, optional
        Adds the probability that the maximum exceeds it (:func:`max_exceedance`).
    query : ndarray of shape (n_points, dim), optional
        Points whose dependence on gaps is reported (the centre always is).
    labels : sequence of str, optional
        Names of the query points.
    rng : None, int or Generator
        For the exceedance draws.

    Returns
    -------
    Diagnostics

    Notes
    -----
    The depth and gap diagnostics need a domain with ``rim_arcs`` (a rim parametrised by one
    angle, as on a disk) or ``rim_circles`` (several rim circles, an annulus: reported rim by
    rim in ``rims``, :mod:`~invert.diagnostics.rims`); for other domains (a ball) only the
    model check and the exceedance probability are computed. Warnings found (a failed model
    check, suspect sensors) are returned in ``warnings`` and issued as
    :class:`ModelCheckWarning`.
    """
    rim = estimate.domain.rim_arcs
    has_prior = None not in prior_params(estimate)
    res = radial = gaps = check = None
    at = {}
    warn = []
    if has_prior and rim is not None:
        res = resolution(estimate, problem)
        radii = (1.0, 0.9, 0.75, 0.5, 0.25)
        deg = resolved_degree(estimate, radii, n_readings=problem.n_readings)
        at = {f"{r:.2f}": int(k) for r, k in zip(radii, deg)}
    names = ["centre"]
    by_rim = None
    if rim is not None:
        radial = radial_sd_profile(estimate)
        pts, names = _gap_points(estimate.domain, rim, query, labels)
        gaps = gap_dependence(problem, pts)
    elif getattr(estimate.domain, "rim_circles", None) is not None:
        if has_prior:
            res = resolution(estimate, problem)
        radial = radial_sd_profile(estimate)
        pts, names = _reference_and_query(estimate.domain, query, labels)
        by_rim = rim_diagnostics(estimate, problem, pts, names, res)
    if has_prior and problem.n_readings < 3:
        warn.append(f"model check skipped: it needs at least 3 readings, got "
                    f"{problem.n_readings}; nothing here tests whether the field is harmonic")
    elif has_prior:
        check = model_check(estimate, problem)
        if check.flagged:
            warn.append(check.verdict)
        if check.suspect:
            warn.append("sensor(s) " + ", ".join(check.suspect) + " read far from what the other "
                        "sensors predict (leave-one-out); check them for faults")
    mx = None
    if threshold is not None:
        mx = max_exceedance(estimate, float(threshold), level=level, rng=rng)
    for w in warn:
        warnings.warn(w, ModelCheckWarning, stacklevel=2)
    return Diagnostics(res, at, radial, gaps, check, mx, threshold, tuple(warn), tuple(names),
                       by_rim)
