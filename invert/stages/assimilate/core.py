# transitional: removed at merge
"""Old import path of the assimilation stage, kept for invert.batch until the merge.

Import from :mod:`invert.stages.assimilate` instead. Old name -> new name: ``_combine_filter``
-> ``combine_filter``, ``_combine_smoother`` -> ``combine_smoother``, ``_linear_recursion`` ->
``linear_recursion``, ``_close`` -> ``close_relative``; every other name is unchanged.
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

# transitional: removed at merge (old private names used by invert/batch/assimilation.py)
_combine_filter = combine_filter
_combine_smoother = combine_smoother
_linear_recursion = linear_recursion
_close = close_relative

__all__ = ["CoefficientDynamics", "FilterSegment", "FilterState", "KalmanSmoother",
           "MeasurementUpdate", "SmoothedSeries", "SmootherState", "filter_segment",
           "filter_summary", "fit_time_scale", "log_likelihood", "measurement_update",
           "run_smoother", "smooth_segment", "smoother_summary", "combine_filter",
           "combine_smoother", "linear_recursion", "close_relative"]
