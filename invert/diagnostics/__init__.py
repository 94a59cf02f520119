"""Diagnostics of an Estimate: depth of information, gaps, exceedance, model check, advice."""

from .advise import SensorAdvice, advise
from .diagnose import Diagnostics, ModelCheck, diagnose, model_check

__all__ = ["Diagnostics", "ModelCheck", "SensorAdvice", "advise", "diagnose", "model_check"]
