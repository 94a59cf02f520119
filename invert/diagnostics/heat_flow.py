r"""Heat flow through a wall with a bore: the net flow per unit length and the rim flux densities.

Both are linear functionals of the coefficients, so their posterior mean, sd and interval come
from the estimate directly (:meth:`invert.problem.Estimate.linear`). The domain is asked for
``heat_flow_row(conductivity)`` (only a region with a bore has one: through the rim of a
source-free disk the net flow is zero) and ``design_normal_derivative`` (radial derivative).

Notes
-----
For a source-free wall the net radially outward flow per unit length is the same through every
circle around the bore, :math:`Q = \oint -k\,\partial_r u\; r\,d\theta = -2\pi k\, d_0`, with
:math:`d_0` the coefficient of :math:`\ln r` [1]_; the local flux density on a rim is
:math:`q_r = -k\,\partial_r u` (positive away from the axis on both rims).

References
----------
.. [1] T. L. Bergman, A. S. Lavine, F. P. Incropera and D. P. DeWitt, *Fundamentals of Heat and
       Mass Transfer*, 7th ed., Wiley, 2011, §3.3.1.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["HeatFlow", "heat_flow", "rim_flux_profile", "has_heat_flow"]

#: Unit of the heat flow: W/m when the conductivity is in W/m/K and the readings in K or deg C
#: (the flow per unit length does not depend on the length unit: ln(b/a) is a pure number).
UNIT_WITH_K = "W/m"
UNIT_WITHOUT_K = "per unit conductivity"


@dataclass(frozen=True)
class HeatFlow:
    """Net radially outward heat flow per unit length through the wall, with its interval."""

    mean: float
    sd: float
    lower: float
    upper: float
    unit: str
    conductivity: float | None
    level: float

    def to_dict(self) -> dict:
        """Return the summary.json entry ``heat_flow``."""
        return {"mean": self.mean, "sd": self.sd, "lower": self.lower, "upper": self.upper,
                "unit": self.unit, "conductivity": self.conductivity, "level": self.level,
                "direction": "positive radially outward (from the bore to the outer rim)"}


def has_heat_flow(domain) -> bool:
    """Whether ``domain`` has a net heat flow through it (a ``heat_flow_row``)."""
    return getattr(domain, "heat_flow_row", None) is not None


def heat_flow(estimate, conductivity=None, level=0.9) -> HeatFlow | None:
    """Net heat flow per unit length through the wall, or None for a domain without a bore.

    Parameters
    ----------
    estimate : Estimate
    conductivity : float, optional
        Thermal conductivity ``k`` (W/m/K); without it the flow is per unit conductivity.
    level : float, default=0.9

    Returns
    -------
    HeatFlow or None
    """
    row = getattr(estimate.domain, "heat_flow_row", None)
    if row is None:
        return None
    k = 1.0 if conductivity is None else float(conductivity)
    s = estimate.linear(row(k)[None, :], level)
    return HeatFlow(float(s.mean[0]), float(s.sd[0]), float(s.lower[0]), float(s.upper[0]),
                    UNIT_WITH_K if conductivity is not None else UNIT_WITHOUT_K,
                    None if conductivity is None else k, level)


def rim_flux_profile(estimate, conductivity=None, level=0.9, n=360):
    """Radially outward flux density ``-k du/dr`` on the domain's rim grid, as a DataFrame.

    Columns: the rim grid's columns (``rim``, ``theta_deg`` on an annulus), then ``mean``, ``sd``,
    ``lower``, ``upper``; per unit conductivity without ``conductivity``.
    """
    k = 1.0 if conductivity is None else float(conductivity)
    pts, cols = estimate.domain.rim_grid(n)
    rows = -k * estimate.domain.design_normal_derivative(pts)
    return estimate.linear(rows, level).to_frame(**cols)
