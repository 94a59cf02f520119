"""Assimilation of logged frames: Kalman filter and RTS smoother over the coefficients.

``dynamics`` (the state-space model), ``filter`` (the measurement update and the filter over a
segment of frames), ``smoother`` (the RTS smoother and the in-memory filter-smoother),
``parallel`` (parallel-in-time elements), ``recursion`` (the steady-state linear
recursions): NumPy/SciPy. ``kernel`` (with ``_kernel_loops``) is the compiled exact
filter-smoother (numba), imported on use; the time-scale fit evaluates its likelihood there.
"""

from .dynamics import CoefficientDynamics
from .filter import (
                     FilterSegment,
                     FilterState,
                     MeasurementUpdate,
                     exact_loglik,
                     filter_segment,
                     fit_time_scale,
                     information_update,
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
    "exact_loglik",
    "filter_segment",
    "filter_summary",
    "fit_time_scale",
    "information_update",
    "linear_recursion",
    "log_likelihood",
    "measurement_update",
    "run_smoother",
    "smooth_segment",
    "smoother_summary",
]
