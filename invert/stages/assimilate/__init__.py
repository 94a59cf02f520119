"""Assimilation of logged frames: Kalman filter and RTS smoother over the coefficients."""

from .core import (CoefficientDynamics, KalmanSmoother, SmoothedSeries, fit_time_scale,
                   run_smoother)

__all__ = ["CoefficientDynamics", "KalmanSmoother", "SmoothedSeries", "fit_time_scale",
           "run_smoother"]
