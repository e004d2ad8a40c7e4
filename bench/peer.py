"""The by-hand peer: what a careful analyst would script with statsmodels and scipy, per series.

For each series of the benchmark fleet (``bench/fleet_data.py``) the peer

1. reads the series (and its exogenous column) from the Parquet extract;
2. **refit check**: fits the model with statsmodels - ``SARIMAX(order=(1,0,1),
   seasonal_order=(0,1,1,7), exog, simple_differencing=True)`` (the likelihood of the differenced
   series, as fitaudit's) or ``ETSModel(error="add", trend="add", damped_trend=True,
   seasonal="add", seasonal_periods=7)`` - and takes the in-sample residuals;
3. **production check**: the one-step errors of the frozen production parameters with the
   statsmodels filter (``SARIMAX.filter`` / ``ETSModel.smooth``; both agree with fitaudit's errors
   to 1e-13 on this fleet) over the audit window;
4. for both checks: the normal PIT, counts in s equiprobable cells (the cell rule of
   docs/method.md §6.3), a loop of ``scipy.stats.power_divergence`` over the beta = 0 column of the
   divergence map (lambda = alpha - 1 for each of the 17 alphas), and ``acorr_ljungbox`` at the
   lag of docs/method.md §9.2.

No simulated calibration, no fleet adjustment, no report and no archive: the peer does strictly
less than the audit.  :func:`measure_peer` times it on a random subset of the fleet and
extrapolates per series, weighting the two model families by their share of the fleet.
"""

from __future__ import annotations

import time
import warnings

import numpy as np
import pyarrow.compute as pc
import pyarrow.dataset as ds
from scipy import stats
from statsmodels.stats.diagnostic import acorr_ljungbox
from statsmodels.tsa.exponential_smoothing.ets import ETSModel
from statsmodels.tsa.statespace.sarimax import SARIMAX

from .fleet_data import AUDIT_WINDOW, FleetSeries

__all__ = ["ALPHAS", "peer_audit", "measure_peer"]

ALPHAS = np.arange(-1.0, 3.0001, 0.25)  # the default alpha grid: 17 members per beta column
SEASON = 7


def _cells(n: int, k: int) -> int:
    """s = clamp(round(2 n^(2/5)), max(k + 3, 4), floor(n / 5)) (docs/method.md §6.3)."""
    return int(min(max(round(2 * n**0.4), max(k + 3, 4)), n // 5))


def _ljung_box_lag(n: int, model_df: int) -> int:
    """h = min(2m, n/5), at least df + 3 (docs/method.md §9.2)."""
    return int(min(max(min(2 * SEASON, n // 5), model_df + 3), n - 1))


def _score(e: np.ndarray, loc: float, scale: float, k: int, model_df: int) -> dict:
    """Cells, the power-divergence loop and Ljung-Box for one residual set."""
    n = e.size
    s = _cells(n, k)
    u = stats.norm.cdf((e - loc) / scale)
    counts = np.bincount(np.minimum((u * s).astype(int), s - 1), minlength=s)
    expected = np.full(s, n / s)
    members = {}
    with warnings.catch_warnings(), np.errstate(all="ignore"):
        warnings.simplefilter("ignore")
        for alpha in ALPHAS:
            members[float(alpha)] = stats.power_divergence(counts, expected, lambda_=float(alpha) - 1.0)
    lag = _ljung_box_lag(n, model_df)
    lb = acorr_ljungbox(e, lags=[lag], model_df=model_df)
    return {"n": n, "cells": s, "members": members, "ljung_box": float(lb["lb_pvalue"].iloc[0])}


def _arima(y: np.ndarray, x: np.ndarray, params: dict) -> dict:
    kwargs = dict(exog=x, order=(1, 0, 1), seasonal_order=(0, 1, 1, SEASON), trend="n", simple_differencing=True)
    fit = SARIMAX(y, **kwargs).fit(disp=0)
    frozen = np.array([params["x:temp_c"], params["ar1"], params["ma1"], params["sma1"], params["sigma2"]])
    errors = SARIMAX(y, **kwargs).filter(frozen).forecasts_error[0][-AUDIT_WINDOW:]
    refit = np.asarray(fit.resid, dtype=float)
    return {
        "production": _score(errors, 0.0, float(np.sqrt(params["sigma2"])), 0, 0),
        "refit": _score(refit, 0.0, float(np.sqrt(np.mean(refit**2))), 1, 3),
    }


def _smoothing(y: np.ndarray, params: dict) -> dict:
    model = ETSModel(y, error="add", trend="add", damped_trend=True, seasonal="add", seasonal_periods=SEASON)
    fit = model.fit(disp=0)
    free = [params[f"s{k}"] for k in range(SEASON - 1)]
    frozen = np.r_[
        params["alpha"], params["beta"], params["gamma"], params["phi"], params["l0"], params["b0"], free, -sum(free)
    ]
    errors = np.asarray(model.smooth(frozen).resid, dtype=float)[-AUDIT_WINDOW:]
    refit = np.asarray(fit.resid, dtype=float)
    return {
        "production": _score(errors, 0.0, float(np.sqrt(params["sigma2"])), 0, 0),
        "refit": _score(refit, float(np.mean(refit)), float(np.std(refit)), 2, 0),
    }


def peer_audit(y: np.ndarray, exog: np.ndarray | None, spec: dict, params: dict) -> dict:
    """Both checks of one series, by hand (see the module docstring)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' convergence and frequency chatter
        if spec["family"] == "arima":
            return _arima(y, exog, params)
        return _smoothing(y, params)


def _read(data_folder: str, keys: list[str]) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """One filtered scan of the extract for the subset's series."""
    table = ds.dataset(data_folder, format="parquet").to_table(filter=pc.field("series").isin(keys))
    table = table.sort_by([("series", "ascending"), ("date", "ascending")])
    key = table.column("series").to_numpy(zero_copy_only=False)
    y = table.column("y").to_numpy()
    x = table.column("temp_c").to_numpy()
    out = {}
    for k in keys:
        rows = np.flatnonzero(key == k)
        out[k] = (y[rows], x[rows])
    return out


def measure_peer(series: list[FleetSeries], data_folder: str, subset: int, seed: int = 1) -> dict:
    """Time the peer on ``subset`` random series of ``series``; seconds per series, extrapolated.

    The estimate weights each family's mean time by its share of the whole fleet, so a subset
    that happens to hold more of one family does not bias it.  Reading the extract is timed too
    and spread over the subset.
    """
    rng = np.random.default_rng(seed)
    chosen = [series[i] for i in sorted(rng.choice(len(series), size=min(subset, len(series)), replace=False))]
    t0 = time.perf_counter()
    data = _read(data_folder, [s.key for s in chosen])
    read_s = time.perf_counter() - t0
    times: dict[str, list[float]] = {}
    for s in chosen:
        y, x = data[s.key]
        t0 = time.perf_counter()
        peer_audit(y, x, s.spec, s.params)
        times.setdefault(s.spec["family"], []).append(time.perf_counter() - t0)
    share = {
        fam: sum(1 for s in series if s.spec["family"] == fam) / len(series)
        for fam in {s.spec["family"] for s in series}
    }
    per_family = {fam: float(np.mean(times.get(fam, [np.nan]))) for fam in share}
    per_series = sum(share[f] * per_family[f] for f in share) + read_s / len(chosen)
    return {
        "subset": len(chosen),
        "per_family_s": per_family,
        "subset_counts": {fam: len(v) for fam, v in times.items()},
        "read_s": read_s,
        "seconds_per_series": per_series,
        "series_per_second": 1.0 / per_series,
    }
