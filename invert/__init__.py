"""rim-invert: the harmonic field in a disk or ball from rim and interior sensor readings.

Cite the methods you use (see the ``References`` section of each stage) and this package as
"rim-invert, version 0.1".
"""

from importlib import metadata as _metadata

from .batch import run_batch
from .diagnostics import Diagnostics, ModelCheck, SensorAdvice, model_check
from .errors import DomainError, FitWarning, InputError, MCMCWarning, ModelCheckWarning
from .geometry import (
                       Ball,
                       Disk,
                       arc_harmonic_measure,
                       ball_poisson_kernel,
                       poisson_kernel,
                       poisson_kernel_nd,
                       real_sph_harm,
)
from .io import Readings, load_layout, load_points, load_readings
from .prior import SmoothnessPrior, truncation_degree
from .problem import Estimate, LinearProblem, PointSummary
from .stages import (
                       RULES,
                       CoefficientDynamics,
                       GaussianPosterior,
                       KalmanSmoother,
                       MCMCSampler,
                       Tikhonov,
                       gaussian_posterior,
                       mcmc,
                       tikhonov,
)
from .workflow import fit, make_domain

try:  # the installed distribution's version (pyproject.toml), one source of truth
    __version__ = _metadata.version("rim-invert")
except _metadata.PackageNotFoundError:  # a source tree that was never installed
    __version__ = "0+unknown"

__all__ = [
    "Ball",
    "CoefficientDynamics",
    "KalmanSmoother",
    "run_batch",
    "Disk",
    "DomainError",
    "Estimate",
    "FitWarning",
    "GaussianPosterior",
    "MCMCSampler",
    "MCMCWarning",
    "gaussian_posterior",
    "mcmc",
    "InputError",
    "Diagnostics",
    "ModelCheck",
    "ModelCheckWarning",
    "SensorAdvice",
    "model_check",
    "LinearProblem",
    "PointSummary",
    "RULES",
    "Readings",
    "SmoothnessPrior",
    "Tikhonov",
    "arc_harmonic_measure",
    "ball_poisson_kernel",
    "poisson_kernel_nd",
    "real_sph_harm",
    "fit",
    "load_layout",
    "load_points",
    "load_readings",
    "make_domain",
    "poisson_kernel",
    "tikhonov",
    "truncation_degree",
]
