"""Geometry: the only package that knows the shape of the region (disk, ball, annulus).

:class:`~invert.geometry.base.Domain` is the contract every region provides; :data:`DOMAINS`
maps the names accepted by ``make_domain(kind=...)`` and the CLI's ``--domain`` to the classes,
each of which builds itself from the prior's smoothness (``from_prior``).
"""

from .annulus import Annulus, radial_profiles
from .arcs import CircleArcs, arc_fourier_coefficients, arc_harmonic_measure, half_mass_width
from .ball import Ball, ball_poisson_kernel, poisson_kernel_nd, real_sph_harm
from .base import Domain, RoundDomain
from .disk import RIM_TOLERANCE, Disk, poisson_kernel

__all__ = ["Domain", "RoundDomain", "Disk", "Ball", "Annulus", "DOMAINS", "domain_class",
           "domain_names",
           "CircleArcs", "RIM_TOLERANCE", "poisson_kernel", "arc_harmonic_measure",
           "arc_fourier_coefficients", "half_mass_width", "ball_poisson_kernel",
           "poisson_kernel_nd", "real_sph_harm", "radial_profiles"]

#: Registered domains by name. A new domain adds one entry here (tests may add one with
#: ``monkeypatch.setitem``); everything downstream asks the class, never the name.
DOMAINS = {"disk": Disk, "ball": Ball, "annulus": Annulus}


def domain_names() -> tuple:
    """Names of the registered domains, in registration order."""
    return tuple(DOMAINS)


def domain_class(kind):
    """Return the domain class registered under ``kind``.

    Raises
    ------
    ValueError
        If ``kind`` is not a registered name.
    """
    try:
        return DOMAINS[kind]
    except (KeyError, TypeError):
        names = " or ".join(repr(k) for k in DOMAINS)
        raise ValueError(f"The 'kind' parameter must be {names}. Got {kind!r} instead.") from None
