"""Inference stages of ``invert``.

Each takes a :class:`~invert.problem.LinearProblem` and returns an
:class:`~invert.problem.Estimate`; none knows the shape of the region. The registry
(:mod:`invert.stages.registry`) maps method names to stage classes.
"""

from ..errors import FitWarning, MCMCWarning
from .assimilate import (
    CoefficientDynamics,
    KalmanSmoother,
    SmoothedSeries,
    fit_time_scale,
    run_smoother,
)
from .gaussian import GaussianPosterior, gaussian_posterior
from .mcmc import MCMCSampler, mcmc
from .registry import STAGES, stage_names
from .tikhonov import RULES, Tikhonov, tikhonov

__all__ = ["Tikhonov", "tikhonov", "RULES", "FitWarning", "GaussianPosterior",
           "gaussian_posterior", "MCMCSampler", "MCMCWarning", "mcmc", "CoefficientDynamics",
           "KalmanSmoother", "SmoothedSeries", "fit_time_scale", "run_smoother", "STAGES",
           "stage_names"]
