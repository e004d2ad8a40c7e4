"""Benchmark: fitting ARIMA-family models with fitaudit versus statsmodels, on the same data.

Three cases, each timed in the same run against the statsmodels estimator with the same
likelihood convention (so the log-likelihoods are comparable):

1. ARMA(1,1) with intercept, n = 500, 20 simulated series; peer ``tsa.arima.model.ARIMA``.
2. The airline model ARIMA(0,1,1)(0,1,1)12 on the monthly CO2 series shipped with statsmodels
   (``datasets.co2``, weekly values averaged by month, 5 empty months interpolated; n = 526);
   peer ``SARIMAX(..., simple_differencing=True)`` (the differenced-series likelihood).
3. AR(2) errors with intercept and two exogenous regressors, n = 1000, 5 simulated series; peer
   ``tsa.arima.model.ARIMA`` with ``exog``.

Times are per fit (best of several passes over the case's series, alternating the two
libraries); ``dll`` is our log-likelihood minus statsmodels' (positive: ours is higher).  Goal:
at least 10x faster at a log-likelihood within 0.01.
"""

from __future__ import annotations

import time
import warnings

import numpy as np
from statsmodels.datasets import co2
from statsmodels.tsa.arima.model import ARIMA
from statsmodels.tsa.statespace.sarimax import SARIMAX

from fitaudit.core.models.arima import Arima

GOAL_RATIO = 10.0
GOAL_LOGLIK = 0.01


def _monthly_co2() -> np.ndarray:
    weekly = co2.load_pandas().data["co2"]
    return weekly.resample("MS").mean().interpolate().to_numpy(dtype=float)


def _cases(quick: bool) -> list[dict]:
    rng = np.random.default_rng(20261201)
    arma = Arima(order=(1, 0, 1), trend="c")
    arma_truth = {"ar1": 0.6, "ma1": 0.3, "intercept": 5.0, "sigma2": 2.0}
    arma_series = [(arma.simulate(arma_truth, 500, rng), None) for _ in range(5 if quick else 20)]

    regression = Arima(order=(2, 0, 0), trend="c")
    regression_truth = {"ar1": 0.5, "ar2": -0.3, "intercept": 1.0, "x:a": 2.0, "x:b": -1.0, "sigma2": 1.0}
    regression_series = []
    for _ in range(2 if quick else 5):
        exog = {"a": rng.normal(size=1000), "b": rng.normal(size=1000)}
        regression_series.append((regression.simulate(regression_truth, 1000, rng, exog=exog), exog))

    return [
        {
            "name": "ARMA(1,1) with intercept, n=500",
            "spec": arma,
            "series": arma_series,
            "peer": "statsmodels ARIMA",
            "fit_peer": lambda y, exog: ARIMA(y, order=(1, 0, 1), trend="c").fit(),
        },
        {
            "name": "airline (0,1,1)(0,1,1)12, monthly CO2, n=526",
            "spec": Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)),
            "series": [(_monthly_co2(), None)],
            "peer": "statsmodels SARIMAX(simple_differencing=True)",
            "fit_peer": lambda y, exog: SARIMAX(
                y, order=(0, 1, 1), seasonal_order=(0, 1, 1, 12), simple_differencing=True
            ).fit(disp=0),
        },
        {
            "name": "AR(2) + intercept + 2 exog, n=1000",
            "spec": regression,
            "series": regression_series,
            "peer": "statsmodels ARIMA with exog",
            "fit_peer": lambda y, exog: ARIMA(
                y, exog=np.column_stack(list(exog.values())), order=(2, 0, 0), trend="c"
            ).fit(),
        },
    ]


def _timed_pass(fit_one, series) -> tuple[float, list]:
    start = time.perf_counter()
    results = [fit_one(y, exog) for y, exog in series]
    return (time.perf_counter() - start) / len(series), results


def main(quick: bool = False) -> list[dict]:
    """Run the three cases; return one row per case (times in milliseconds per fit)."""
    passes = 2 if quick else 5
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' frequency and convergence chatter
        for case in _cases(quick):
            spec, series = case["spec"], case["series"]
            ours_fit = lambda y, exog, spec=spec: spec.fit(y, exog=exog)  # noqa: E731
            ours_fit(*series[0])  # warm-up both libraries
            case["fit_peer"](*series[0])
            ours_times, peer_times = [], []
            for _ in range(passes):
                t, ours_results = _timed_pass(ours_fit, series)
                ours_times.append(t)
                t, peer_results = _timed_pass(case["fit_peer"], series)
                peer_times.append(t)
            dll = np.array([a.loglik - b.llf for a, b in zip(ours_results, peer_results)])
            ours_ms, peer_ms = 1e3 * min(ours_times), 1e3 * min(peer_times)
            rows.append(
                {
                    "case": case["name"],
                    "peer": case["peer"],
                    "fits": len(series),
                    "ours_ms": ours_ms,
                    "peer_ms": peer_ms,
                    "ratio": peer_ms / ours_ms,
                    "dll_max_abs": float(np.max(np.abs(dll))),
                    "dll_min": float(np.min(dll)),
                    "ours_converged": all(r.converged for r in ours_results),
                    "met": bool(peer_ms / ours_ms >= GOAL_RATIO and np.min(dll) > -GOAL_LOGLIK),
                }
            )
    return rows


def _print_table(rows: list[dict]) -> None:
    header = (
        f"{'case':<46} {'fits':>4} {'fitaudit ms':>11} {'statsmodels ms':>14} {'ratio':>7} {'max|dll|':>9} {'goal':>5}"
    )
    print(header)
    print("-" * len(header))
    for r in rows:
        print(
            f"{r['case']:<46} {r['fits']:>4} {r['ours_ms']:>11.2f} {r['peer_ms']:>14.2f} {r['ratio']:>6.1f}x "
            f"{r['dll_max_abs']:>9.1e} {'met' if r['met'] else 'NOT':>5}"
        )
    print(
        f"goal: >= {GOAL_RATIO:.0f}x faster per fit with log-likelihood not lower than statsmodels' by "
        f"{GOAL_LOGLIK}; dll = ours - statsmodels; peers: " + "; ".join(r["peer"] for r in rows)
    )


if __name__ == "__main__":
    import sys

    _print_table(main(quick="--quick" in sys.argv))
