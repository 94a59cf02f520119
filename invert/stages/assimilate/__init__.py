"""Assimilation of logged frames: Kalman filter and RTS smoother over the coefficients.

``dynamics`` (the state-space model), ``filter`` (the measurement update and the filter over a
segment of frames), ``smoother`` (the RTS smoother and the in-memory filter-smoother),
``parallel`` (parallel-in-time elements) and ``recursion`` (the steady-state linear
recursions). Pure NumPy/SciPy.
"""

from .dynamics import CoefficientDynamics
from .filter import (
                     FilterSegment,
                     FilterState,
                     MeasurementUpdate,
                     filter_segment,
                     fit_time_scale,
                     log_likelihood,
                     measurement_update,
)
from .parallel import combine_filter, combine_smoother, filter_summary, smoother_summary
from .recursion import close_relative, linear_recursion
from .smoother import KalmanSmoother, SmoothedSeries, SmootherState, run_smoother, smooth_segment

__all__ = [
    "CoefficientDynamics",
    "FilterSegment",
    "FilterState",
    "KalmanSmoother",
    "MeasurementUpdate",
    "SmoothedSeries",
    "SmootherState",
    "close_relative",
    "combine_filter",
    "combine_smoother",
    "filter_segment",
    "filter_summary",
    "fit_time_scale",
    "linear_recursion",
    "log_likelihood",
    "measurement_update",
    "run_smoother",
    "smooth_segment",
    "smoother_summary",
]
