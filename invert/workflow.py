"""One-call fitting for notebooks and the command line.

``fit`` turns readings (a DataFrame, a CSV path or a :class:`~invert.io.readings.Readings`) into an
:class:`~invert.problem.Estimate`: it builds the domain with a truncation degree chosen from the
prior, the linear problem, and runs the chosen stage.
"""

from __future__ import annotations

from pathlib import Path

from .geometry import domain_class
from .problem import LinearProblem
from .io.readings import Readings, load_readings

__all__ = ["fit", "make_domain", "as_readings", "run_stage", "METHODS"]

METHODS = ("tikhonov", "gaussian", "mcmc")


def make_domain(radius=1.0, center=None, *, kind="disk", s=2.0, n_modes=None):
    """Build a domain whose truncation degree leaves a negligible share of prior variance out.

    Parameters
    ----------
    radius : float
    center : sequence of float, optional
    kind : str, default="disk"
        A name registered in :data:`invert.geometry.DOMAINS` (``"disk"``, ``"ball"``).
    s : float, default=2.0
        Smoothness order used to choose the truncation (see
        :func:`~invert.prior.truncation_degree`).
    n_modes : int, optional
        Force the truncation degree.

    Notes
    -----
    The registered class builds itself (``from_prior``) with its own truncation rule
    (``truncation_rule()``). For a ball the omitted-variance tail on the sphere decays slowly,
    so the truncation uses ``tol=BALL_TRUNCATION_TOL`` and is capped at ``BALL_MAX_DEGREE``
    (values and reasons in :mod:`invert.geometry.ball`); ``s`` must exceed 1 on the sphere.
    """
    return domain_class(kind).from_prior(radius, center, s=s, n_modes=n_modes)


def as_readings(data, *, dim=2) -> Readings:
    """Return Readings from a DataFrame, a CSV path, or a Readings object."""
    if isinstance(data, Readings):
        return data
    if isinstance(data, (str, Path)):
        return load_readings(data, dim=dim)
    return Readings.from_frame(data, dim=dim)


def fit(readings, *, radius=1.0, center=None, method="tikhonov", rule="evidence", s=2.0,
        n_modes=None, kind="disk", **options):
    """Fit readings and return an :class:`~invert.problem.Estimate`.

    Parameters
    ----------
    readings : pandas.DataFrame, str, Path or Readings
        Columns ``x, y, value`` and optional ``sigma, sensor`` (a blank value is a gap).
    radius : float, default=1.0
    center : (float, float), optional
    method : {"tikhonov"}, default="tikhonov"
    rule : str, default="evidence"
        Parameter-choice rule for the Tikhonov stage.
    s : float, default=2.0
        Smoothness order of the prior.
    n_modes : int, optional
        Truncation degree; chosen from ``s`` when omitted.
    kind : str, default="disk"
        The region, a name in :data:`invert.geometry.DOMAINS`; readings have the domain's
        ``dim`` coordinates (a ball reads ``x, y, z``, see :class:`~invert.geometry.ball.Ball`).
    **options
        Passed to the stage.

    Examples
    --------
    >>> import numpy as np, pandas as pd
    >>> th = np.linspace(0, 2 * np.pi, 16, endpoint=False)
    >>> df = pd.DataFrame({"x": np.cos(th), "y": np.sin(th), "value": 20 + np.cos(th),
    ...                    "sigma": 0.05})
    >>> est = fit(df, radius=1.0)
    >>> round(float(est.at([[0.0, 0.0]]).mean[0]), 1)
    20.0
    """
    if method not in METHODS:
        raise ValueError(f"The 'method' parameter of fit must be one of {METHODS}. "
                         f"Got {method!r} instead.")
    r = as_readings(readings, dim=domain_class(kind).dim)
    domain = make_domain(radius, center, kind=kind, s=s, n_modes=n_modes)
    problem = LinearProblem.from_readings(r, domain)
    if method == "tikhonov":
        options = {"rule": rule, **options}
    return run_stage(problem, method, s=s, **options)


def run_stage(problem, method="tikhonov", *, s=2.0, seed=None, **options):
    """Run the named stage on a problem and return its Estimate.

    This is the one place that maps method names to stage classes; new stages register here.
    """
    if method == "tikhonov":
        from .stages import Tikhonov

        return Tikhonov(s=s, **options).fit(problem)
    if method in ("gaussian", "mcmc"):
        # s sets the truncation only; these stages estimate s unless fix_s=True holds it at s.
        from .stages import GaussianPosterior, MCMCSampler

        s_stage = s if options.pop("fix_s", False) else None
        if method == "gaussian":
            return GaussianPosterior(s_stage, **options).fit(problem)
        return MCMCSampler(s=s_stage, rng=seed, **options).fit(problem)
    raise ValueError(f"The 'method' parameter must be one of {METHODS}. Got {method!r} instead.")
