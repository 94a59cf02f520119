"""Figures per domain: a registry keyed by domain class, looked up along the class's MRO.

Every entry has the signature of :func:`write_figures` and returns ``[(path, caption), ...]``.
A subclass of a registered domain gets its parent's figures; a new domain registers its own
writer here (or a test does, with ``monkeypatch.setitem(FIGURES, cls, writer)``). A domain with
no entry gets no figures (the report still has its tables).
"""

from __future__ import annotations

from pathlib import Path

from ..geometry.annulus import Annulus
from ..geometry.ball import Ball
from ..geometry.disk import Disk
from . import ball_figures
from .annulus_figures import write_figures_annulus
from .disk_figures import write_figures_disk
from .plots import visible

__all__ = ["FIGURES", "BALL_CAPTIONS", "figures_for", "write_figures", "write_figures_ball_report"]


#: Captions of the sphere figures, by file name (any other figure is captioned by its name).
BALL_CAPTIONS = {
    "surface_map": "Estimated value and posterior sd on the surface of the ball, as a "
                   "latitude/longitude map; circles: surface readings, crosses: sensors "
                   "without a reading.",
    "interior_slices": "Estimate (top) and posterior sd (bottom) on the three central planes "
                       "z = 0, y = 0 and x = 0 (the planes of field.csv), one colour scale per "
                       "row; readings within a tenth of the radius of a plane are marked on it.",
}


def write_figures_ball_report(out_dir, estimate, problem, readings=None, level=0.9, unit="",
                              *, length_unit="", **_):
    """Write the sphere figures and return them with captions.

    Sphere figures (:func:`invert.report.ball_figures.write_figures_ball`) with the captions
    of :data:`BALL_CAPTIONS`; the diagnostics keywords of the disk writer are not used.
    """
    out = Path(out_dir)
    before = set(out.glob("*.png"))
    made = ball_figures.write_figures_ball(out, estimate, problem, readings, level, unit=unit,
                                           length_unit=length_unit)
    paths = [Path(p) for p in made] if made else sorted(set(out.glob("*.png")) - before)
    return [(p, BALL_CAPTIONS.get(p.stem, p.stem.replace("_", " "))) for p in paths]


#: Figure writer per domain class.
FIGURES = {Disk: write_figures_disk, Ball: write_figures_ball_report,
           Annulus: write_figures_annulus}


def figures_for(domain):
    """Return the figure writer registered for ``domain``'s class or its nearest base, or None."""
    for cls in type(domain).__mro__:
        if cls in FIGURES:
            return FIGURES[cls]
    return None


def write_figures(out_dir, estimate, problem, readings=None, level=0.9, unit="", *,
                  length_unit="", diagnostics=None, threshold=None, conductivity=None):
    """Write the figures of a fit into ``out_dir``; return ``[(path, caption), ...]``.

    The writer is chosen by :func:`figures_for` from ``estimate.domain``; ``conductivity``
    (for the heat flow of a domain with a bore) is passed on only when given.
    """
    writer = figures_for(estimate.domain)
    if writer is None:
        return []
    # user strings are drawn literally: control characters as escapes (no mathtext either,
    # see invert.report.plots.literal_text, applied when a figure is saved)
    unit, length_unit = visible(unit or ""), visible(length_unit or "")
    extra = {} if conductivity is None else {"conductivity": conductivity}
    return writer(out_dir, estimate, problem, readings, level, unit, length_unit=length_unit,
                  diagnostics=diagnostics, threshold=threshold, **extra)
