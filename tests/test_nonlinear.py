"""NonlinearAR: user mean functions named by import path, and the built-in two-regime SETAR.

Outside references: statsmodels' AutoReg and numpy's least squares on the sunspot numbers
shipped in ``statsmodels.datasets.sunspots``; simulation truths; a brute-force threshold search.
The user-style mean functions live in ``tests/nlar_functions.py`` and are imported by path string.
"""

from __future__ import annotations

import numpy as np
import pytest

from fitaudit.core.exceptions import FitauditError, InputError, InsufficientDataError, SpecificationError
from fitaudit.core.models.nonlinear import NonlinearAR, resolve_function
from fitaudit.core.models.registry import get_family, model_from_dict

statsmodels = pytest.importorskip("statsmodels")


@pytest.fixture(autouse=True)
def user_functions_importable(monkeypatch, repo_root):
    """Put tests/ on sys.path so that 'nlar_functions:<name>' resolves, as a worker's package would."""
    monkeypatch.syspath_prepend(str(repo_root / "tests"))


def _sunspots() -> np.ndarray:
    from statsmodels.datasets import sunspots

    return sunspots.load_pandas().data["SUNACTIVITY"].to_numpy()  # yearly, 1700-2008


def _user(name: str, start: dict, lags=(1,), **kwargs) -> NonlinearAR:
    return NonlinearAR(function=f"nlar_functions:{name}", lags=lags, start=start, **kwargs)


SETAR_TRUTH = {
    "c1": 1.0,
    "ar1_1": 0.6,
    "ar1_2": -0.2,
    "c2": -1.0,
    "ar2_1": -0.4,
    "ar2_2": 0.3,
    "threshold": 0.5,
    "delay": 2.0,
    "sigma2": 1.0,
}


# -- user mean functions ------------------------------------------------------------------------
def test_linear_mean_function_matches_ordinary_least_squares():
    from statsmodels.tsa.ar_model import AutoReg

    y = _sunspots()
    spec = _user("linear_ar2", {"c": 0.0, "a1": 0.5, "a2": 0.0}, lags=(1, 2))
    fit = spec.fit(y)
    reference = AutoReg(y, lags=2, trend="c").fit()
    ours = np.array([fit.params[k] for k in ("c", "a1", "a2")])
    np.testing.assert_allclose(ours, reference.params, rtol=0, atol=1e-6)  # source: statsmodels AutoReg (OLS)
    X = np.column_stack([np.ones(y.size - 2), y[1:-1], y[:-2]])
    np.testing.assert_allclose(ours, np.linalg.lstsq(X, y[2:], rcond=None)[0], rtol=0, atol=1e-6)  # source: numpy lstsq
    assert fit.sigma2 == pytest.approx(reference.sigma2, rel=1e-9)  # source: AutoReg sigma2 = RSS / nobs
    assert fit.loglik == pytest.approx(reference.llf, abs=1e-6)  # source: AutoReg conditional loglik
    bse = np.array([fit.extras["bse"][k] for k in ("c", "a1", "a2")])
    np.testing.assert_allclose(bse, reference.bse, rtol=1e-5)  # source: AutoReg bse
    assert fit.nobs == y.size - 2
    assert np.isnan(fit.residuals[:2]).all()
    np.testing.assert_array_equal(spec.errors(y, fit.params), fit.residuals)  # common practice: identity


def test_exogenous_input_matches_least_squares():
    rng = np.random.default_rng(4)
    x = rng.normal(size=400)
    spec = _user("ar1_with_input", {"c": 0.0, "a": 0.0, "b": 0.0}, exog=["temp_c"])
    y = spec.simulate({"c": 1.0, "a": 0.5, "b": 2.0, "sigma2": 1.0}, 400, rng, exog={"temp_c": x})
    fit = spec.fit(y, exog={"temp_c": x, "unused": np.zeros(400)})
    X = np.column_stack([np.ones(399), y[:-1], x[1:]])
    expected = np.linalg.lstsq(X, y[1:], rcond=None)[0]
    np.testing.assert_allclose([fit.params[k] for k in "cab"], expected, rtol=0, atol=1e-6)  # source: numpy lstsq
    np.testing.assert_array_equal(spec.errors(y, fit.params, exog={"temp_c": x}), fit.residuals)
    with pytest.raises(SpecificationError, match="needs exogenous columns \\['temp_c'\\]"):
        spec.fit(y)
    with pytest.raises(SpecificationError, match="missing; got \\['x0'\\]"):
        spec.fit(y, exog=x)
    with pytest.raises(SpecificationError, match="declares no exogenous inputs"):
        _user("linear_ar2", {"c": 0.0, "a1": 0.5, "a2": 0.0}, lags=(1, 2)).fit(y, exog={"temp_c": x})


@pytest.mark.parametrize(
    "name,truth,start,seed",
    [
        (
            "expar1",
            {"c": 0.2, "a": 0.3, "b": 0.6, "g": 0.8, "sigma2": 1.0},
            {"c": 0.0, "a": 0.5, "b": 0.3, "g": 1.0},
            3,
        ),
        (
            "lstar1",
            {"c1": 0.5, "a1": 0.6, "c2": -1.0, "a2": -0.5, "g": 3.0, "r": 0.5, "sigma2": 0.5},
            {"c1": 0.0, "a1": 0.5, "c2": -0.5, "a2": -0.2, "g": 2.0, "r": 0.3},
            3,
        ),
    ],
    ids=["EXPAR(1)", "LSTAR(1)"],
)
def test_simulation_round_trip_recovers_nonlinear_parameters(name, truth, start, seed):
    spec = _user(name, start)
    rng = np.random.default_rng(seed)
    innovations = rng.normal(0.0, np.sqrt(truth["sigma2"]), 2000)
    y = spec.simulate(truth, 2000, rng, innovations=innovations)
    # source: the simulation's own innovations (model identity y_t = f(...) + e_t)
    np.testing.assert_allclose(spec.errors(y, truth)[1:], innovations[1:], rtol=0, atol=1e-9)
    fit = spec.fit(y)
    assert fit.converged
    for key, value in truth.items():
        z = (fit.params[key] - value) / fit.extras["bse"][key]
        assert abs(z) < 3, (key, fit.params[key], value)  # common practice: within 3 standard errors


# -- SETAR -------------------------------------------------------------------------------------------
def test_setar_recovers_threshold_and_delay():
    spec = NonlinearAR(function="setar", lags=(1, 2))
    y = spec.simulate(SETAR_TRUTH, 2000, np.random.default_rng(8))
    fit = spec.fit(y)
    assert fit.params["delay"] == 2.0  # source: simulation truth
    assert fit.params["threshold"] == pytest.approx(0.5, abs=0.05)  # source: simulation truth (super-consistent)
    for key in ("c1", "ar1_1", "ar1_2", "c2", "ar2_1", "ar2_2", "sigma2"):
        z = (fit.params[key] - SETAR_TRUTH[key]) / fit.extras["bse"][key]
        assert abs(z) < 3, key  # common practice: within 3 standard errors
    assert sum(fit.extras["regime_sizes"]) == fit.nobs == 1998
    np.testing.assert_array_equal(spec.errors(y, fit.params), fit.residuals)


def _brute_force_setar(y: np.ndarray, lags: tuple, delays: list, trim: float):
    """Every admissible (delay, threshold) refitted with numpy lstsq: the slow reference."""
    origin = max(max(lags), max(delays))
    X = np.column_stack([np.ones(y.size - origin)] + [y[origin - lag : y.size - lag] for lag in lags])
    target = y[origin:]
    best = (np.inf, None, None)
    for d in delays:
        z = y[origin - d : y.size - d]
        low, high = np.quantile(z, [trim, 1 - trim])
        for r in np.unique(z):
            lower = z <= r
            if not (low <= r <= high) or min(lower.sum(), (~lower).sum()) < X.shape[1] + 3:
                continue
            rss = sum(
                np.sum((target[m] - X[m] @ np.linalg.lstsq(X[m], target[m], rcond=None)[0]) ** 2)
                for m in (lower, ~lower)
            )
            if rss < best[0] - 1e-9:
                best = (rss, d, r)
    return best


def test_setar_grid_search_equals_brute_force():
    rng = np.random.default_rng(12)
    spec = NonlinearAR(function="setar", lags=(1, 2))
    y = 50.0 + spec.simulate(SETAR_TRUTH, 250, rng)  # a level far from zero tests the centring
    fit = spec.fit(y)
    rss, delay, threshold = _brute_force_setar(y, (1, 2), [1, 2], 0.15)
    assert fit.params["delay"] == delay  # source: brute-force search with numpy lstsq
    assert fit.params["threshold"] == threshold
    assert fit.sigma2 * fit.nobs == pytest.approx(rss, rel=1e-9)


def test_setar_with_fixed_delay_and_simulation_identity():
    spec = NonlinearAR(function="setar", lags=(1,), delay=3)
    truth = {"c1": 0.5, "ar1_1": 0.7, "c2": -0.5, "ar2_1": 0.2, "threshold": 0.0, "delay": 3.0, "sigma2": 0.25}
    rng = np.random.default_rng(2)
    e = rng.normal(0.0, 0.5, 600)
    y = spec.simulate(truth, 600, rng, innovations=e)
    np.testing.assert_allclose(spec.errors(y, truth)[3:], e[3:], rtol=0, atol=1e-12)  # source: model identity
    fit = spec.fit(y)
    assert fit.params["delay"] == 3.0 and np.isnan(fit.residuals[:3]).all()
    with pytest.raises(SpecificationError, match="have delay 2 but the spec fixes 3"):
        spec.errors(y, fit.params | {"delay": 2.0})


# -- containment of user code and bad import paths ---------------------------------------------------
def test_a_failing_mean_function_is_contained_with_a_clear_message():
    y = _sunspots()
    spec = _user("broken", {"a": 0.1})
    with pytest.raises(
        SpecificationError,
        match="mean function 'nlar_functions:broken' raised ValueError: division by the wrong column",
    ) as info:
        spec.fit(y)
    assert isinstance(info.value, FitauditError) and isinstance(info.value.__cause__, ValueError)
    assert "NLAR[nlar_functions:broken]" in str(info.value)
    with pytest.raises(SpecificationError, match="returned shape \\(307,\\); expected \\(308,\\)"):
        _user("wrong_length", {"a": 0.1}).fit(y)
    with pytest.raises(SpecificationError, match="NaN or infinite values at the starting values"):
        _user("expar1", {"c": 0.0, "a": 0.5, "b": 0.3, "g": -50.0}).fit(y)


@pytest.mark.parametrize(
    "path,match",
    [
        ("no_such_module_fitaudit_test:f", "cannot import module 'no_such_module_fitaudit_test'"),
        (
            "nlar_functions:missing",
            "has no attribute 'missing'.*public callables are: ar1_with_input, broken, expar1, linear_ar2, lstar1, "
            "never_returns, wrong_length\\.",
        ),
        ("nlar_functions:NOT_A_FUNCTION", "is a int, not a function"),
    ],
)
def test_bad_import_paths_name_the_problem(path, match):
    with pytest.raises(SpecificationError, match=match):
        resolve_function(path)
    with pytest.raises(SpecificationError, match=match):
        NonlinearAR(function=path, lags=(1,), start={"a": 0.0}).fit(_sunspots())


# -- specs, registry, bad input ---------------------------------------------------------------------
def test_registry_and_description():
    setar = NonlinearAR(function="setar", lags=[1, 2])
    user = _user("linear_ar2", {"c": 0.0, "a1": 0.5, "a2": 0.0}, lags=(1, 2))
    assert get_family("nonlinear-ar") is NonlinearAR
    assert model_from_dict(setar.to_dict()) == setar and model_from_dict(user.to_dict()) == user
    assert setar.describe() == "SETAR(2; lags 1,2; delay search)"
    assert user.describe() == "NLAR[nlar_functions:linear_ar2] lags 1,2"
    assert setar.param_names() == ["c1", "ar1_1", "ar1_2", "c2", "ar2_1", "ar2_2", "threshold", "delay", "sigma2"]
    assert user.param_names() == ["c", "a1", "a2", "sigma2"]
    assert setar.n_dynamic_params() == 2 and setar.seasonal_period() == 1


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"function": "nlar_functions.linear_ar2"}, "import path 'package.module:function'"),
        ({"function": "nlar_functions:linear_ar2", "lags": (1,)}, "needs start="),
        ({"function": "nlar_functions:linear_ar2", "start": {"sigma2": 1.0}}, "other than 'sigma2'"),
        ({"function": "nlar_functions:linear_ar2", "start": {"a": float("nan")}}, "must be finite"),
        ({"function": "nlar_functions:linear_ar2", "start": {"a": 0.0}, "delay": 1}, "apply to function='setar' only"),
        ({"function": "setar", "lags": (1, 1)}, "distinct positive integers"),
        ({"function": "setar", "lags": (0,)}, "distinct positive integers"),
        ({"function": "setar", "start": {"a": 0.0}}, "drop start"),
        ({"function": "setar", "trim": 0.5}, "'trim' parameter of NonlinearAR must be"),
        ({"function": "setar", "delay": 0}, "'delay' parameter of NonlinearAR must be"),
    ],
)
def test_invalid_specs_are_rejected(kwargs, match):
    with pytest.raises((SpecificationError, InputError), match=match):
        NonlinearAR(**kwargs)


def test_bad_series_are_rejected():
    setar = NonlinearAR(function="setar", lags=(1, 2))
    user = _user("linear_ar2", {"c": 0.0, "a1": 0.5, "a2": 0.0}, lags=(1, 2))
    y = _sunspots()
    with pytest.raises(InputError, match="constant"):
        setar.fit(np.full(100, 2.0))
    with pytest.raises(InsufficientDataError, match="needs at least 42"):  # 2 + ceil(6 / 0.15)
        setar.fit(y[:30])
    with pytest.raises(InsufficientDataError, match="needs at least 9"):
        user.fit(y[:8])
    with pytest.raises(InputError, match="NaN or infinite value.*position 7"):
        user.fit(np.where(np.arange(y.size) == 7, np.inf, y))
    spiky = np.zeros(120)
    spiky[[10, 40, 70, 90, 110]] = [1.0, 2.0, 3.0, 4.0, 5.0]  # 95% ties: no admissible threshold
    with pytest.raises(InputError, match="no threshold between"):
        setar.fit(spiky)
    with pytest.raises(SpecificationError, match="unexpected \\['b'\\]"):
        user.errors(y, {"c": 0.0, "a1": 0.5, "a2": 0.0, "b": 1.0, "sigma2": 1.0})
