"""Forecasting model families: ARIMA with exogenous inputs, exponential smoothing, nonlinear AR.

Every family follows the protocol of :class:`ForecastModel`; :data:`FAMILIES` maps the
registry names (``arima``, ``smoothing``, ``nonlinear-ar``) to the classes.
"""

from ._base import FitResult, ForecastModel, check_series, exog_matrix
from .arima import Arima
from .nonlinear import NonlinearAR
from .registry import FAMILIES, as_model, get_family, model_from_dict
from .smoothing import ExpSmoothing

__all__ = [
    "FAMILIES",
    "Arima",
    "ExpSmoothing",
    "FitResult",
    "ForecastModel",
    "NonlinearAR",
    "as_model",
    "check_series",
    "exog_matrix",
    "get_family",
    "model_from_dict",
]
