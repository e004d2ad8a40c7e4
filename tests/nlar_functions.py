"""User-style mean functions for the NonlinearAR tests, imported by path string ("nlar_functions:...").

Each takes ``theta`` (1-D), ``lags`` (n, L) with column j = y_{t - lag_j}, ``exog`` (n, k) and
returns the (n,) conditional means, as fitaudit's NonlinearAR expects.
"""

from __future__ import annotations

import numpy as np


def linear_ar2(theta, lags, exog):
    """c + a1 y_{t-1} + a2 y_{t-2}: a linear AR(2), to compare with ordinary least squares."""
    c, a1, a2 = theta
    return c + a1 * lags[:, 0] + a2 * lags[:, 1]


def expar1(theta, lags, exog):
    """Exponential AR(1) of Haggan & Ozaki (1981) with intercept: c + (a + b exp(-g y_{t-1}^2)) y_{t-1}."""
    c, a, b, g = theta
    y1 = lags[:, 0]
    return c + (a + b * np.exp(-g * y1**2)) * y1


def lstar1(theta, lags, exog):
    """Logistic smooth-transition AR(1): c1 + a1 y1 + (c2 + a2 y1) / (1 + exp(-g (y1 - r)))."""
    c1, a1, c2, a2, g, r = theta
    y1 = lags[:, 0]
    return c1 + a1 * y1 + (c2 + a2 * y1) / (1.0 + np.exp(-g * (y1 - r)))


def ar1_with_input(theta, lags, exog):
    """c + a y_{t-1} + b x_t with one exogenous input."""
    c, a, b = theta
    return c + a * lags[:, 0] + b * exog[:, 0]


def broken(theta, lags, exog):
    """A mean function with a bug."""
    raise ValueError("division by the wrong column")


def wrong_length(theta, lags, exog):
    """Returns one value too few."""
    return lags[1:, 0]


NOT_A_FUNCTION = 42


def never_returns(theta, lags, exog):
    """A mean function stuck in an endless loop that even swallows ordinary exceptions."""
    import time

    while True:
        try:
            time.sleep(0.05)
        except Exception:  # noqa: BLE001 - the point: user code that catches everything it can
            pass
