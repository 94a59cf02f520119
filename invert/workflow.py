"""One-call fitting for notebooks and the command line.

``fit`` turns readings (a DataFrame, a CSV path or a :class:`~invert.io.readings.Readings`) into an
:class:`~invert.problem.Estimate`: it builds the domain with a truncation degree chosen from the
prior, the linear problem, and runs the chosen stage.
"""

from __future__ import annotations

import dataclasses
import warnings
from pathlib import Path

import numpy as np

from .errors import FitWarning
from .geometry import domain_class
from .io.readings import Readings, load_readings
from .problem import LinearProblem
from .stages._truncation import truncation_for
from .stages.registry import STAGES, method_for, stage_names
from .stages.robust import robust_fit
from .stages.suspects import screened_mixture

__all__ = ["fit", "make_domain", "as_readings", "problem_from_readings", "run_stage",
           "make_stage", "problem_for_stage", "fit_stage", "residual_dof_warning", "METHODS",
           "MIN_RESIDUAL_DOF", "robust_stage", "ROBUST_METHODS", "available_memory",
           "check_memory"]

#: The method names of the stage registry (:data:`invert.stages.registry.STAGES`).
METHODS = stage_names()


def make_domain(radius=1.0, center=None, *, kind="disk", s=2.0, n_modes=None, **shape):
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
    **shape
        Shape parameters of the domain class, e.g. ``inner_radius`` of an annulus (a class
        without that parameter refuses it with a ``ValueError``).

    Notes
    -----
    The registered class builds itself (``from_prior``) with its own truncation rule
    (``truncation_rule()``). For a ball the omitted-variance tail on the sphere decays slowly,
    so the truncation uses ``tol=BALL_TRUNCATION_TOL`` and is capped at ``BALL_MAX_DEGREE``
    (values and reasons in :mod:`invert.geometry.ball`); ``s`` must exceed 1 on the sphere.
    """
    return domain_class(kind).from_prior(radius, center, s=s, n_modes=n_modes, **shape)


def as_readings(data, *, dim=2) -> Readings:
    """Return Readings from a DataFrame, a CSV path, or a Readings object."""
    if isinstance(data, Readings):
        return data
    if isinstance(data, (str, Path)):
        return load_readings(data, dim=dim)
    return Readings.from_frame(data, dim=dim)


def problem_from_readings(readings, domain):
    """Build the linear problem; what was assumed reading the file becomes its notes.

    :meth:`LinearProblem.from_readings <invert.problem.LinearProblem.from_readings>` with
    ``readings.notes`` (delimiter, decimal mark, encoding, readings repeated at one position)
    put first in the problem's notes, which every stage passes on as warnings (summary.json).
    """
    problem = LinearProblem.from_readings(readings, domain)
    notes = tuple(getattr(readings, "notes", ()))
    if notes:
        problem = dataclasses.replace(problem, notes=notes + tuple(problem.notes))
    return problem


def fit(readings, *, radius=1.0, center=None, method=None, rule=None, s=2.0,
        n_modes=None, kind="disk", inner_radius=None, **options):
    """Fit readings and return an :class:`~invert.problem.Estimate`.

    Parameters
    ----------
    readings : pandas.DataFrame, str, Path or Readings
        Columns ``x, y, value`` and optional ``sigma, sensor`` (a blank value is a gap).
    radius : float, default=1.0
    center : (float, float), optional
    method : {"averaged", "tikhonov", "gaussian", "mcmc"}, optional
        The stage (:data:`invert.stages.registry.STAGES`); by default ``averaged`` (the
        closed-form posterior averaged over the smoothness order and prior scale,
        :class:`~invert.stages.averaged.AveragedPosterior`), or ``tikhonov`` when ``rule`` or
        a Tikhonov option (``lam``, ``noise_sd``) is given. ``tikhonov`` (regularised least
        squares, :class:`~invert.stages.tikhonov.Tikhonov`), ``gaussian`` (closed-form
        posterior at evidence-optimal hyperparameters,
        :class:`~invert.stages.gaussian.GaussianPosterior`) or ``mcmc`` (posterior draws with
        sampled hyperparameters, faulty sensors or angle errors,
        :class:`~invert.stages.mcmc.sampler.MCMCSampler`).
    rule : str, optional
        Parameter-choice rule of the Tikhonov stage, one of :data:`invert.RULES`
        (``"evidence"`` by default; ``"fixed"`` with ``lam=``). Only with
        ``method="tikhonov"``: the other stages choose their hyperparameters themselves.
    s : float, default=2.0
        Smoothness order of the prior.
    n_modes : int, optional
        Truncation degree; chosen from ``s`` when omitted.
    kind : str, default="disk"
        The region, a name in :data:`invert.geometry.DOMAINS`; readings have the domain's
        ``dim`` coordinates (a ball reads ``x, y, z``, see :class:`~invert.geometry.ball.Ball`).
    inner_radius : float, optional
        Bore radius of an annulus (``kind="annulus"``, :class:`~invert.geometry.annulus.
        Annulus`); other domains refuse it.
    **options
        Passed to the stage: for ``tikhonov`` e.g. ``lam``, ``noise_sd``; for ``gaussian``
        and ``mcmc`` ``fix_s``; for ``mcmc`` also ``faulty``, ``angle_sd_deg``,
        ``max_steps``, ``n_draws`` (see each stage class).

    Raises
    ------
    ValueError
        ``method`` not one of :data:`METHODS`, or ``rule`` given for another method.

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
    method = method_for(method, {"rule": rule, **options})
    if method not in METHODS:
        raise ValueError(f"The 'method' parameter of fit must be one of {METHODS} "
                         f"(see invert.fit). Got {method!r} instead.")
    if rule is not None and method != "tikhonov":
        raise ValueError(f"The 'rule' parameter of fit belongs to method='tikhonov'; "
                         f"method={method!r} chooses its hyperparameters itself.")
    r = as_readings(readings, dim=domain_class(kind).dim)
    shape = {} if inner_radius is None else {"inner_radius": inner_radius}
    domain = make_domain(radius, center, kind=kind, s=s, n_modes=n_modes, **shape)
    problem = problem_from_readings(r, domain)
    if method == "tikhonov":
        options = {"rule": rule or "evidence", **options}
    return robust_stage(problem, method, s=s, **options)[0]


#: Methods whose fit is wrapped by :func:`invert.stages.robust.robust_fit` (the default).
ROBUST_METHODS = ("tikhonov",)
#: Methods whose fit is wrapped by :func:`invert.stages.suspects.screened_mixture` (gross
#: errors left out, doubtful readings mixed into the posterior).
MIXTURE_METHODS = ("averaged",)


def robust_stage(problem, method="tikhonov", *, s=2.0, seed=None, **options):
    """:func:`run_stage`, with gross errors and faulty sensors treated for the default method.

    Returns
    -------
    estimate : Estimate
    problem : LinearProblem
        The problem the estimate was fitted to: the given one, or without the readings the
        robust step excluded (they are moved to the gaps and named in the warnings).
    """
    def fit_fn(p):
        return run_stage(p, method, s=s, seed=seed, **options)

    if method in MIXTURE_METHODS:
        return screened_mixture(problem, fit_fn)
    if method not in ROBUST_METHODS:
        return fit_fn(problem), problem
    return robust_fit(problem, fit_fn)


def make_stage(method="tikhonov", *, s=2.0, seed=None, **options):
    """Build the stage registered under ``method`` from the common settings.

    Parameters
    ----------
    method : str
        A name of :data:`invert.stages.registry.STAGES`.
    s : float, default=2.0
        Smoothness order (the Tikhonov penalty; for the Gaussian and MCMC stages it only sized
        the truncation unless ``fix_s=True`` holds it fixed).
    seed : None, int or numpy.random.Generator
        For sampling stages.
    **options
        Passed to the stage.
    """
    if method not in STAGES:
        raise ValueError(f"The 'method' parameter must be one of {METHODS}. "
                         f"Got {method!r} instead.")
    return STAGES[method].from_settings(s=s, seed=seed, **options)


def problem_for_stage(problem, stage):
    """Return the problem with the truncation degree the stage needs.

    The design is rebuilt from ``problem.points`` on ``problem.domain.with_modes(n)`` so that
    the roughest smoothness the stage tries (``stage.lowest_s()``) loses less than the
    domain's tolerance of its prior rim variance (:func:`~invert.stages._truncation.
    truncation_for`). Nothing changes when the truncation already suffices, when the stage
    uses the truncation it is given (``lowest_s() is None``), or when the problem cannot be
    rebuilt: no points or domain, or a rebuilt design that does not reproduce the given ``G``
    in its first columns (1e-10, algebra), so a hand-made design is never replaced. A raised
    truncation is recorded in ``assembly_notes``.
    """
    s_min = stage.lowest_s()
    dom = problem.domain
    if s_min is None or dom is None or problem.points is None or not hasattr(dom, "with_modes"):
        return problem
    need = truncation_for(dom, s_min)
    if need <= getattr(dom, "n_modes", need):
        return problem
    new_dom = dom.with_modes(need)
    G = new_dom.design(problem.points)
    p = problem.n_coef
    if p > G.shape[1] or not np.allclose(G[:, :p], problem.G, rtol=1e-10, atol=1e-10):
        return problem
    note = (f"harmonics raised from {dom.n_modes} to {need} so that the roughest smoothness "
            f"considered (s = {s_min:g}) is not truncated")
    return dataclasses.replace(problem, G=G, degrees=new_dom.degrees,
                               eigenvalues=new_dom.eigenvalues, domain=new_dom,
                               assembly_notes=tuple(problem.assembly_notes) + (note,))


#: Fewer residual degrees of freedom than this get a :class:`~invert.errors.FitWarning`.
MIN_RESIDUAL_DOF = 3.0


def residual_dof_warning(estimate, minimum=MIN_RESIDUAL_DOF):
    """Return the warning for a fit leaving fewer than ``minimum`` residual dof, or None.

    ``estimate.info["residual_dof"]`` is m minus the effective degrees of freedom; the
    Tikhonov stage keeps no such margin for its default rule when sigma is given (see
    :class:`~invert.stages.tikhonov.Tikhonov`), so a nearly interpolating fit is said here.
    """
    rdof = estimate.info.get("residual_dof") if estimate.info else None
    m = estimate.info.get("n_readings")
    if rdof is None or not np.isfinite(rdof) or rdof >= minimum:
        return None
    return (f"only {rdof:.3g} residual degrees of freedom are left of {m} readings: the fit "
            f"nearly interpolates them, so the chi-square check and any noise estimate rest on "
            f"little; more readings or a rule that keeps a margin (rule='gcv', --rule gcv) help")


def fit_stage(stage, problem):
    """``stage.fit(problem_for_stage(problem, stage))``: the stage on the truncation it needs.

    A fit left with fewer than :data:`MIN_RESIDUAL_DOF` residual degrees of freedom gets a
    :class:`~invert.errors.FitWarning`, also recorded in ``Estimate.warnings``.
    """
    estimate = stage.fit(problem_for_stage(problem, stage))
    note = residual_dof_warning(estimate)
    if note is None:
        return estimate
    warnings.warn(note, FitWarning, stacklevel=2)
    return dataclasses.replace(estimate, warnings=tuple(estimate.warnings) + (note,))


def run_stage(problem, method="tikhonov", *, s=2.0, seed=None, **options):
    """Run the named stage on a problem and return its Estimate.

    The stage comes from the registry (:func:`make_stage`) and sees the problem with the
    truncation it needs (:func:`problem_for_stage`).
    """
    return fit_stage(make_stage(method, s=s, seed=seed, **options), problem)


#: Bytes per field-map point: coordinates, the inside mask, mean, sd and interval, the
#: field.csv table and its text (measured: ``--grid 1000`` and ``2000`` on the demo data took
#: 73 bytes per grid cell, 93 per point inside the disk; rounded up). The folded map of
#: report.files.field_summary peaks about 1.24x above the former design-row route (tracemalloc
#: at --grid 1000: 101 vs 81 bytes per grid cell), i.e. about 115 per inside point: still below.
MAP_BYTES_PER_POINT = 128
#: Working ``p x p`` matrices of a fit (covariance, its root, factorisations; measured 6-12 on
#: the demo data with 2001 and 4001 coefficients), and the rows of design evaluated per block.
COEF_MATRICES, DESIGN_BLOCK_ROWS = 12, 8192


def available_memory() -> float:
    """Bytes of memory available now (psutil when installed, else ``os.sysconf``)."""
    try:
        import psutil

        return float(psutil.virtual_memory().available)
    except ImportError:  # pragma: no cover - psutil is optional
        import os

        return float(os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE"))


def _gb(nbytes):
    return f"{nbytes / 1e9:.3g} GB" if nbytes < 1e12 else f"{nbytes / 1e12:.3g} TB"


def _map_bytes(domain, grid):
    # Field points of an n x n map scale as n^2 (counted on a 41 x 41 map).
    k = 41
    return MAP_BYTES_PER_POINT * len(domain.field_grid(k)[0]) * (grid / k) ** 2


def _fit_bytes(p, m):
    return 8.0 * (COEF_MATRICES * p * p + 4 * m * p + 2 * DESIGN_BLOCK_ROWS * p)


def check_memory(domain, *, grid, n_readings, given_modes=False, available=None):
    """Stop with an InputError when ``--grid`` or ``--n-modes`` cannot fit in memory.

    Parameters
    ----------
    domain : Domain
        The domain the fit will use (its ``n_coef`` and ``field_grid``).
    grid : int
        Size of the field maps (``--grid``).
    n_readings : int
    given_modes : bool, default=False
        Whether the truncation was given (``--n-modes``), so that the error names it.
    available : float, optional
        Bytes available (default :func:`available_memory`).

    Raises
    ------
    InputError
        With the memory needed and the largest value that fits.
    """
    from .errors import InputError

    avail = available_memory() if available is None else float(available)
    maps = _map_bytes(domain, grid)
    need = _fit_bytes(domain.n_coef, n_readings)
    if need + maps > avail and need > avail / 2:
        lo, hi = 0, domain.n_modes  # largest truncation that fits, by bisection
        while lo < hi:
            mid = (lo + hi + 1) // 2
            ok = _fit_bytes(domain.with_modes(mid).n_coef, n_readings) + maps <= avail
            lo, hi = (mid, hi) if ok else (lo, mid - 1)
        name = f"--n-modes {domain.n_modes}" if given_modes else \
            f"{domain.n_modes} harmonics"
        raise InputError(name, f"needs about {_gb(need)} for its {domain.n_coef} "
                         f"coefficients; at most --n-modes {lo} fits in the {_gb(avail)} "
                         f"available")
    if need + maps > avail:
        room = avail - need
        fits = int(grid * np.sqrt(max(room, 0.0) / maps))
        raise InputError(f"--grid {grid}", f"needs about {_gb(maps)} for the field maps; at "
                         f"most --grid {fits} fits in the {_gb(avail)} available")
