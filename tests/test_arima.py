"""ARIMA family: checks against statsmodels (test-only), published fits and simulation round trips.

Likelihood convention under test (Arima's docstring): the exact Gaussian likelihood of the
differenced series as a regression with stationary ARMA errors (Box, Jenkins, Reinsel and Ljung
2015, ch. 7).  In statsmodels this is ``SARIMAX(y, exog=X, ..., simple_differencing=True)`` with
the trend terms passed as columns of ``X``; for d = D = 0 it is also ``tsa.arima.model.ARIMA``.
With d + D > 0 statsmodels' ``ARIMA`` keeps the integration in the state with an approximate
diffuse prior, which is a different (and slightly different-valued) likelihood.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.signal import lfiltic
from statsmodels.datasets import elec_equip, macrodata, nile, sunspots
from statsmodels.tsa.ar_model import AutoReg
from statsmodels.tsa.arima.model import ARIMA
from statsmodels.tsa.arima_process import arma2ma, arma_acovf
from statsmodels.tsa.statespace.sarimax import SARIMAX
from statsmodels.tsa.statespace.structural import UnobservedComponents

from fitaudit.core.exceptions import ConvergenceWarning, InputError, InsufficientDataError, SpecificationError
from fitaudit.core.models import _arma
from fitaudit.core.models.arima import Arima
from fitaudit.core.models.registry import get_family, model_from_dict

# -- data shipped with statsmodels --------------------------------------------------------------


@pytest.fixture(scope="module")
def sunspot_series() -> np.ndarray:
    """Wolf's yearly sunspot numbers 1700-2008 (statsmodels.datasets.sunspots)."""
    return sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(dtype=float)


@pytest.fixture(scope="module")
def nile_series() -> np.ndarray:
    """Yearly Nile flow at Aswan 1871-1970 (statsmodels.datasets.nile)."""
    return nile.load_pandas().data["volume"].to_numpy(dtype=float)


@pytest.fixture(scope="module")
def equipment_log() -> np.ndarray:
    """Log of the monthly euro-area electrical-equipment turnover index, not seasonally adjusted
    (statsmodels.datasets.elec_equip, 1995-01 onwards)."""
    return np.log(elec_equip.load().data.iloc[:, 0].to_numpy(dtype=float))


@pytest.fixture(scope="module")
def macro() -> dict:
    """US quarterly macro series (statsmodels.datasets.macrodata), transformed to growth rates."""
    data = macrodata.load_pandas().data
    return {
        "log_gdp": 100.0 * np.log(data["realgdp"].to_numpy(dtype=float)),
        "consumption_growth": 100.0 * np.diff(np.log(data["realcons"].to_numpy(dtype=float))),
        "income_growth": 100.0 * np.diff(np.log(data["realdpi"].to_numpy(dtype=float))),
        "unemployment_change": np.diff(data["unemp"].to_numpy(dtype=float)),
        "inflation": data["infl"].to_numpy(dtype=float),
    }


def _statsmodels_exog(spec: Arima, n: int, exog: dict | None = None) -> np.ndarray | None:
    """Trend terms as regressors in levels (intercept 1, drift t = 1..n), then exogenous columns."""
    cols = []
    names = spec.param_names(list(exog or {}))
    if "intercept" in names:
        cols.append(np.ones(n))
    if "drift" in names:
        cols.append(np.arange(1.0, n + 1.0))
    cols += [np.asarray(v, dtype=float) for v in (exog or {}).values()]
    return np.column_stack(cols) if cols else None


def _reference_model(spec: Arima, y: np.ndarray, exog: dict | None = None) -> SARIMAX:
    """statsmodels' SARIMAX with the same differenced-series likelihood (test-only reference)."""
    return SARIMAX(
        y,
        exog=_statsmodels_exog(spec, y.size, exog),
        order=spec.order,
        seasonal_order=spec.seasonal if any(spec.seasonal[:3]) else (0, 0, 0, 0),
        simple_differencing=True,
    )


def _reference_vector(spec: Arima, params: dict, exog_names: list[str]) -> np.ndarray:
    """Our parameters in SARIMAX order: regression, ar, ma, seasonal ar, seasonal ma, sigma2."""
    names = spec.param_names(exog_names)
    regression = [params[n] for n in names if n in ("intercept", "drift") or n.startswith("x:")]
    arma = [params[n] for n in names if n.startswith(("ar", "ma", "sar", "sma"))]
    return np.array(regression + arma + [params["sigma2"]])


def _assert_matches_reference(fit, reference, spec, exog_names, atol=1e-3, rtol=1e-3):
    """Parameters within atol + rtol |value|, log-likelihood within 0.01."""
    ours = _reference_vector(spec, fit.params, exog_names)
    np.testing.assert_allclose(ours, reference.params, atol=atol, rtol=rtol)
    assert abs(fit.loglik - reference.llf) < 0.01  # common practice: statsmodels' log-likelihood to 0.01


# -- the likelihood kernel against statsmodels' Kalman filter ------------------------------------

KERNEL_CASES = [
    # order, seasonal, trend, exog count, ARMA coefficients
    ((1, 0, 1), (0, 0, 0, 0), "c", 0, [0.6, 0.3]),
    ((2, 0, 1), (0, 0, 0, 0), "c", 2, [0.5, -0.3, 0.4]),
    ((0, 0, 2), (0, 0, 0, 0), "n", 0, [0.5, -0.2]),
    ((1, 1, 1), (0, 0, 0, 0), "t", 0, [0.3, -0.6]),
    ((0, 1, 1), (0, 1, 1, 12), "n", 0, [-0.4, -0.6]),
    ((1, 0, 0), (1, 0, 1, 4), "c", 1, [0.5, 0.3, -0.4]),
    ((2, 1, 2), (1, 1, 1, 4), "n", 0, [0.4, -0.2, 0.3, 0.1, 0.2, -0.5]),
    ((4, 0, 0), (0, 0, 0, 0), "ct", 0, [0.5, -0.2, 0.1, 0.05]),
]


@pytest.mark.parametrize("order, seasonal, trend, n_exog, arma", KERNEL_CASES)
def test_exact_likelihood_and_innovations_equal_the_kalman_filter(order, seasonal, trend, n_exog, arma):
    """At fixed parameters, our loglik and v_t / sqrt(F_t) equal SARIMAX's Kalman filter."""
    rng = np.random.default_rng(7)
    n = 240
    spec = Arima(order=order, seasonal=seasonal, trend=trend)
    exog = {f"z{i}": rng.normal(size=n) for i in range(n_exog)}
    y = rng.normal(size=n).cumsum() * 0.2 + rng.normal(size=n)
    names = spec.param_names(list(exog))
    params = dict(zip([nm for nm in names if nm.startswith(("ar", "ma", "sar", "sma"))], arma))
    params.update(
        {nm: 0.5 + 0.1 * i for i, nm in enumerate(names) if nm in ("intercept", "drift") or nm.startswith("x:")}
    )
    params["sigma2"] = 1.7
    params = {nm: params[nm] for nm in names}

    model = _reference_model(spec, y, exog)
    model.ssm.tolerance = 0.0  # no steady-state shortcut: statsmodels' filter then is exact to ~1e-12
    vector = _reference_vector(spec, params, list(exog))
    filtered = model.filter(vector)
    reference_errors = filtered.forecasts_error[0] / np.sqrt(filtered.forecasts_error_cov[0, 0]) * np.sqrt(1.7)

    data = spec._prepare(y, exog or None, fitting=False)
    layout_coefs = np.array([params[nm] for nm in names if nm.startswith(("ar", "ma", "sar", "sma"))])
    beta = np.array([params[nm] for nm in names[len(layout_coefs) : -1]])
    ar_poly, ma_poly = _polynomials(spec, layout_coefs)
    r = max(len(ar_poly), len(ma_poly)) - 1
    system = _arma.ExactLikelihood(data.rows, r).system(ar_poly, ma_poly)
    c = np.concatenate(([1.0], -beta))
    loglik = _arma.gaussian_loglik(system.logdet, float(c @ system.gram @ c), data.rows.shape[1], 1.7)

    assert loglik == pytest.approx(model.loglike(vector), abs=1e-8)  # source: statsmodels SARIMAX.loglike
    errors = spec.errors(y, params, exog or None)
    lost = order[1] + seasonal[1] * seasonal[3]
    assert np.isnan(errors[:lost]).all()
    np.testing.assert_allclose(errors[lost:], reference_errors, atol=1e-8)  # source: statsmodels Kalman filter


def _polynomials(spec: Arima, coefs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Multiplied-out polynomials, built here independently of Arima's bookkeeping."""
    p, _, q = spec.order
    P, _, Q, s = spec.seasonal
    ar, ma, sar, sma = np.split(coefs, np.cumsum([p, q, P]))
    ar_poly = _arma.seasonal_product(np.r_[1.0, -ar], np.r_[1.0, -sar], max(s, 1))
    ma_poly = _arma.seasonal_product(np.r_[1.0, ma], np.r_[1.0, sma], max(s, 1))
    return ar_poly, ma_poly


def test_likelihood_convention_is_the_differenced_series(nile_series):
    """d = 0: equal to statsmodels ARIMA; d > 0: equal to SARIMAX(simple_differencing=True) and
    different from ARIMA's approximate-diffuse likelihood of the levels."""
    rng = np.random.default_rng(3)
    y = np.cumsum(rng.normal(size=150)) + rng.normal(size=150)
    stationary = Arima(order=(1, 0, 1), trend="c")
    params = {"ar1": 0.7, "ma1": 0.2, "intercept": 1.0, "sigma2": 2.0}
    reference = ARIMA(y, order=(1, 0, 1), trend="c")
    reference.ssm.tolerance = 0.0
    expected = reference.loglike(np.array([1.0, 0.7, 0.2, 2.0]))  # source: statsmodels ARIMA (d = 0)
    assert _exact_loglik(stationary, y, params) == pytest.approx(expected, abs=1e-8)

    integrated = Arima(order=(0, 1, 1))
    params = {"ma1": -0.73, "sigma2": 20600.0}
    ours = _exact_loglik(integrated, nile_series, params)
    differenced = SARIMAX(nile_series, order=(0, 1, 1), simple_differencing=True)
    differenced.ssm.tolerance = 0.0
    levels = ARIMA(nile_series, order=(0, 1, 1)).loglike(np.array([-0.73, 20600.0]))
    expected = differenced.loglike(np.array([-0.73, 20600.0]))  # source: statsmodels SARIMAX(simple_differencing=True)
    assert ours == pytest.approx(expected, abs=1e-8)
    assert (
        abs(ours - levels) > 1e-3
    )  # source: statsmodels ARIMA with d = 1 (approximate diffuse prior): about 0.008 apart here


def _exact_loglik(spec: Arima, y: np.ndarray, params: dict) -> float:
    data = spec._prepare(y, None, fitting=False)
    coefs = np.array([v for k, v in params.items() if k.startswith(("ar", "ma"))])
    beta = np.array([v for k, v in params.items() if k in ("intercept", "drift")])
    ar_poly, ma_poly = _polynomials(spec, coefs)
    system = _arma.ExactLikelihood(data.rows, max(len(ar_poly), len(ma_poly)) - 1).system(ar_poly, ma_poly)
    c = np.concatenate(([1.0], -beta))
    return _arma.gaussian_loglik(system.logdet, float(c @ system.gram @ c), data.rows.shape[1], params["sigma2"])


# -- kernel pieces ------------------------------------------------------------------------------


def test_autocovariances_match_statsmodels():
    ar_poly = np.array([1.0, -0.5, 0.3, -0.1])
    ma_poly = np.array([1.0, 0.4, -0.2])
    ours = _arma.arma_autocovariance(ar_poly, ma_poly, 8)
    np.testing.assert_allclose(ours, arma_acovf(ar_poly, ma_poly, nobs=8), rtol=1e-10)  # source: statsmodels arma_acovf


@pytest.mark.parametrize("nlags", [1, 2, 6])
def test_autocovariances_with_one_ar_coefficient_match_statsmodels(nlags):
    ar_poly = np.array([1.0, 0.7])
    ma_poly = np.array([1.0, 0.4, 0.0, 0.0, 0.0, -0.3])
    ours = _arma.arma_autocovariance(ar_poly, ma_poly, nlags)
    # source: statsmodels arma_acovf
    np.testing.assert_allclose(ours, arma_acovf(ar_poly, ma_poly, nobs=nlags), rtol=1e-10)


@pytest.mark.parametrize("pacf", [[0.5], [0.9, -0.8], [-0.3, 0.6, 0.95, -0.2]])
def test_pacf_transform_gives_stationary_polynomials_and_inverts(pacf):
    phi = _arma.pacf_to_coefficients(np.array(pacf))
    roots = np.roots(np.r_[1.0, -phi][::-1])
    assert np.all(
        np.abs(roots) > 1.0
    )  # source: stationarity = roots outside the unit circle (Box et al. 2015, sect. 3.2)
    # source: the Durbin-Levinson step-down inverts the recursion (Brockwell & Davis 1991, sect. 5.2)
    np.testing.assert_allclose(_arma.coefficients_to_pacf(phi), pacf, atol=1e-12)
    assert _arma.is_stationary(phi)
    assert not _arma.is_stationary(np.r_[phi[:-1], 1.0])  # source: |r_p| = phi_p = 1 lies on the boundary


@pytest.mark.parametrize(
    "ar_poly, ma_poly",
    [
        ([1.0, -0.6], [1.0, 0.3]),
        ([1.0, -0.5, 0.3], [1.0, 0.4, 0.0]),
        ([1.0, -0.2, 0.1, -0.3, 0.05], [1.0, 0.5, 0.1, 0.0, 0.2]),
        ([1.0, -0.5], [1.0, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, -0.6]),  # AR(1)(0,0,1)7: one AR lag, r = 7
        ([1.0, 0.8], [1.0, 0.4, 0.0, 0.0, 0.0, 0.0, 0.0, -0.6, -0.24]),  # (1 + 0.4B)(1 - 0.6B^7)
        ([1.0, -0.4, 0.0, 0.0, -0.5, 0.2], [1.0, 0.3]),  # (1 - 0.4B)(1 - 0.5B^4): two AR lags apart
    ],
)
def test_state_covariance_equals_the_covariance_of_lfiltic_states(ar_poly, ma_poly):
    """Pz against the definition: the lfiltic state of the inverse filter from exact pre-sample moments."""
    ar_poly, ma_poly = np.array(ar_poly), np.array(ma_poly)
    r = max(len(ar_poly), len(ma_poly)) - 1
    gamma = arma_acovf(ar_poly, ma_poly, nobs=r)
    psi = arma2ma(ar_poly, ma_poly, lags=r)
    # joint covariance of (w_{-1..-r}, e_{-1..-r}): gamma(|j - l|) and E[w_{-j} e_{-l}] = psi_{l-j}
    joint = np.eye(2 * r)
    for j in range(r):
        for m in range(r):
            joint[j, m] = gamma[abs(j - m)]
            joint[j, r + m] = joint[r + m, j] = psi[m - j] if m >= j else 0.0
    basis = np.eye(2 * r)
    mapping = np.column_stack([lfiltic(ar_poly, ma_poly, y=basis[k, r:], x=basis[k, :r]) for k in range(2 * r)])
    expected = mapping @ joint @ mapping.T
    # source: statsmodels arma_acovf / arma2ma moments mapped by scipy.signal.lfiltic
    np.testing.assert_allclose(_arma.initial_state_covariance(ar_poly, ma_poly), expected, atol=1e-12)


# -- fits against statsmodels ----------------------------------------------------------------------


def test_arma11_with_intercept_on_inflation_matches_statsmodels(macro):
    y = macro["inflation"]
    spec = Arima(order=(1, 0, 1), trend="c")
    fit = spec.fit(y)
    reference = ARIMA(y, order=(1, 0, 1), trend="c").fit()
    ours = _reference_vector(spec, fit.params, [])
    np.testing.assert_allclose(ours, reference.params, atol=1e-3, rtol=1e-3)  # source: statsmodels ARIMA fit
    assert abs(fit.loglik - reference.llf) < 0.01  # source: statsmodels ARIMA fit (llf -456.0756)
    approx = ARIMA(y, order=(1, 0, 1), trend="c").fit(cov_type="approx").bse
    # source: statsmodels bse from its numerical Hessian (cov_type="approx")
    np.testing.assert_allclose(_reference_vector(spec, fit.extras["bse"], []), approx, rtol=1e-2)


def test_arma11_with_intercept_on_simulated_series_matches_statsmodels():
    rng = np.random.default_rng(20261201)
    spec = Arima(order=(1, 0, 1), trend="c")
    y = spec.simulate({"ar1": 0.6, "ma1": 0.3, "intercept": 5.0, "sigma2": 2.0}, 500, rng)
    fit = spec.fit(y)
    reference = ARIMA(y, order=(1, 0, 1), trend="c").fit()
    _assert_matches_reference(fit, reference, spec, [])  # source: statsmodels ARIMA fit


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_seasonal_ar1_on_simulated_daily_series_matches_statsmodels(seed):
    """AR(1)(0,1,1)7: the quasi-Newton iterations stop at statsmodels' maximum, not short of it."""
    rng = np.random.default_rng(seed)
    spec = Arima(order=(1, 0, 0), seasonal=(0, 1, 1, 7))
    y = spec.simulate({"ar1": 0.5, "sma1": -0.6, "sigma2": 1.0}, 730, rng)
    fit = spec.fit(y)
    reference = _reference_model(spec, y).fit(disp=0)
    assert fit.converged
    _assert_matches_reference(fit, reference, spec, [])  # source: statsmodels SARIMAX(simple_differencing=True) fit
    assert fit.loglik > reference.llf - 1e-4  # common practice: not below statsmodels' maximum


@pytest.mark.parametrize("seed", [4, 5, 6])
def test_arma22_on_simulated_series_reaches_the_statsmodels_maximum(seed):
    """ARMA(2,2) with intercept (a ridge of near-cancelling roots): log-likelihood not below statsmodels'."""
    rng = np.random.default_rng(seed)
    spec = Arima(order=(2, 0, 2), trend="c")
    truth = {"ar1": 0.5, "ar2": 0.2, "ma1": 0.4, "ma2": -0.2, "intercept": 3.0, "sigma2": 1.5}
    y = spec.simulate(truth, 500, rng)
    fit = spec.fit(y)
    reference = ARIMA(y, order=(2, 0, 2), trend="c").fit()
    assert fit.converged
    assert fit.loglik > reference.llf - 0.01  # source: statsmodels ARIMA fit; common practice: to 0.01


def test_arima111_with_drift_on_log_gdp_matches_statsmodels(macro):
    y = macro["log_gdp"]
    spec = Arima(order=(1, 1, 1), trend="t")
    fit = spec.fit(y)
    reference = _reference_model(spec, y).fit(disp=0)
    _assert_matches_reference(fit, reference, spec, [])  # source: statsmodels SARIMAX(simple_differencing=True) fit
    assert fit.nobs == y.size - 1  # source: one value lost to the difference


def test_airline_model_on_equipment_turnover_matches_statsmodels(equipment_log):
    spec = Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12))
    fit = spec.fit(equipment_log)
    # statsmodels' default tolerance stops about 0.012 short of the maximum here; a tight BFGS run reaches it
    reference = _reference_model(spec, equipment_log).fit(disp=0, method="bfgs", gtol=1e-8, maxiter=1000)
    _assert_matches_reference(fit, reference, spec, [])  # source: statsmodels SARIMAX(simple_differencing=True) fit
    assert (
        np.isnan(fit.residuals[:13]).all() and not np.isnan(fit.residuals[13:]).any()
    )  # source: d + sD = 13 values lost


def test_regression_with_ar2_errors_on_consumption_matches_statsmodels(macro):
    y = macro["consumption_growth"]
    exog = {"income": macro["income_growth"], "unemp": macro["unemployment_change"]}
    spec = Arima(order=(2, 0, 0), trend="c")
    fit = spec.fit(y, exog=exog)
    X = np.column_stack(list(exog.values()))
    reference = ARIMA(y, exog=X, order=(2, 0, 0), trend="c").fit()
    _assert_matches_reference(fit, reference, spec, list(exog))  # source: statsmodels ARIMA with exog
    approx = ARIMA(y, exog=X, order=(2, 0, 0), trend="c").fit(cov_type="approx").bse
    # source: statsmodels bse from its numerical Hessian (cov_type="approx")
    np.testing.assert_allclose(_reference_vector(spec, fit.extras["bse"], list(exog)), approx, rtol=1e-2)
    assert list(fit.params) == [
        "ar1",
        "ar2",
        "intercept",
        "x:income",
        "x:unemp",
        "sigma2",
    ]  # source: docs/architecture.md §6 (parameter names)


def test_regression_with_ar2_errors_on_simulated_series_matches_statsmodels():
    rng = np.random.default_rng(99)
    n = 1000
    exog = {"a": rng.normal(size=n), "b": rng.normal(size=n)}
    spec = Arima(order=(2, 0, 0), trend="c")
    truth = {"ar1": 0.5, "ar2": -0.3, "intercept": 1.0, "x:a": 2.0, "x:b": -1.0, "sigma2": 1.0}
    y = spec.simulate(truth, n, rng, exog=exog)
    fit = spec.fit(y, exog=exog)
    reference = ARIMA(y, exog=np.column_stack(list(exog.values())), order=(2, 0, 0), trend="c").fit()
    _assert_matches_reference(fit, reference, spec, list(exog))  # source: statsmodels ARIMA with exog


# -- published fits ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "p, published",
    [
        # source: statsmodels documentation example "Autoregressive Moving Average (ARMA): Sunspots data"
        # (examples/notebooks/tsa_arma_0), output of sm.tsa.ARMA(dta, (p, 0)).fit(): const, ar.L1.., aic, bic
        (2, {"intercept": 49.659542, "ar": [1.390656, -0.688571], "aic": 2622.636338065809, "bic": 2637.5697031734}),
        (
            3,
            {
                "intercept": 49.749936,
                "ar": [1.300810, -0.508093, -0.129650],
                "aic": 2619.4036286964474,
                "bic": 2638.0703350809363,
            },
        ),
    ],
)
def test_sunspot_autoregressions_reproduce_the_statsmodels_documentation(sunspot_series, p, published):
    fit = Arima(order=(p, 0, 0), trend="c").fit(sunspot_series)
    ar = [fit.params[f"ar{i + 1}"] for i in range(p)]
    np.testing.assert_allclose(ar, published["ar"], atol=2e-5)  # source: published table above
    # source: published table above; the likelihood is flat in the mean (3e-6 relative)
    assert fit.params["intercept"] == pytest.approx(published["intercept"], abs=1e-3)
    assert fit.aic == pytest.approx(published["aic"], abs=1e-4)  # source: published table above
    assert fit.bic == pytest.approx(published["bic"], abs=1e-4)  # source: published table above


def test_nile_arima011_is_the_durbin_koopman_local_level_fit(nile_series):
    """ARIMA(0,1,1) is the reduced form of the local level model: theta sigma2 = -sigma2_eps and
    (1 + theta)^2 sigma2 = sigma2_eta (Harvey 1989, sect. 2.5, from memory)."""
    fit = Arima(order=(0, 1, 1)).fit(nile_series)
    theta, sigma2 = fit.params["ma1"], fit.params["sigma2"]
    # source: Durbin & Koopman (2012), Time Series Analysis by State Space Methods, 2nd ed., Nile
    # local level MLE sigma2_eps = 15099, sigma2_eta = 1469.1 (section 2.10 from memory; values as
    # quoted in stats.stackexchange.com/q/99160); the book rounds, so compare to 1e-4 relative
    assert -theta * sigma2 == pytest.approx(15099.0, rel=1e-4)
    assert (1.0 + theta) ** 2 * sigma2 == pytest.approx(1469.1, rel=1e-4)
    # the same point in statsmodels' exact-diffuse local level: equal up to the constant 0.5 log(2 pi)
    # that statsmodels' diffuse log-likelihood keeps for the first observation
    local_level = UnobservedComponents(nile_series, "llevel", use_exact_diffuse=True)
    value = local_level.loglike(np.array([-theta * sigma2, (1.0 + theta) ** 2 * sigma2]))
    assert fit.loglik == pytest.approx(
        value + 0.5 * np.log(2 * np.pi), abs=1e-6
    )  # source: statsmodels UnobservedComponents


def test_css_autoregression_is_conditional_least_squares(sunspot_series):
    """For a pure AR the conditional sum of squares is OLS on lags (statsmodels AutoReg)."""
    fit = Arima(order=(2, 0, 0), trend="c", method="css").fit(sunspot_series)
    reference = AutoReg(sunspot_series, lags=2, trend="c").fit()
    const = fit.params["intercept"] * (1.0 - fit.params["ar1"] - fit.params["ar2"])
    ours = [const, fit.params["ar1"], fit.params["ar2"]]
    np.testing.assert_allclose(ours, reference.params, rtol=1e-8)  # source: statsmodels AutoReg
    assert fit.loglik == pytest.approx(reference.llf, abs=1e-8)  # source: statsmodels AutoReg llf
    assert fit.sigma2 == pytest.approx(reference.sigma2, rel=1e-10)  # source: statsmodels AutoReg sigma2
    assert fit.nobs == reference.nobs  # source: statsmodels AutoReg nobs (n - p)


# -- simulation round trips ----------------------------------------------------------------------

ROUND_TRIPS = [
    (Arima(order=(1, 0, 1), trend="c"), {"ar1": 0.6, "ma1": 0.3, "intercept": 5.0, "sigma2": 2.0}, None),
    (Arima(order=(1, 1, 1), trend="t"), {"ar1": 0.4, "ma1": -0.3, "drift": 0.2, "sigma2": 1.0}, None),
    (Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)), {"ma1": -0.4, "sma1": -0.6, "sigma2": 0.5}, None),
    (
        Arima(order=(2, 0, 0), trend="c"),
        {"ar1": 0.5, "ar2": -0.3, "intercept": 1.0, "x:a": 2.0, "x:b": -1.0, "sigma2": 1.0},
        2,
    ),
]


@pytest.mark.parametrize("spec, truth, n_exog", ROUND_TRIPS, ids=[case[0].describe() for case in ROUND_TRIPS])
def test_simulation_round_trip_recovers_parameters_within_three_standard_errors(spec, truth, n_exog):
    rng = np.random.default_rng(2000)
    n = 2000
    exog = {name: rng.normal(size=n) for name in ("a", "b")[: n_exog or 0]} or None
    y = spec.simulate(truth, n, rng, exog=exog)
    fit = spec.fit(y, exog=exog)
    assert fit.converged
    for name, value in truth.items():
        se = fit.extras["bse"][name]
        assert np.isfinite(se) and se > 0
        assert abs(fit.params[name] - value) < 3.0 * se, (
            name,
            fit.params[name],
            value,
            se,
        )  # source: asymptotic normality of the MLE


@pytest.mark.parametrize("phi, theta", [(0.9, 0.0), (0.7, 0.5)])
def test_simulation_starts_in_the_stationary_law(phi, theta):
    """Var(y_0) of many one-value paths equals gamma(0) = sigma2 (1 + 2 phi theta + theta^2) / (1 - phi^2)."""
    spec = Arima(order=(1, 0, 1))
    rng = np.random.default_rng(12)
    first = np.array([spec.simulate({"ar1": phi, "ma1": theta, "sigma2": 2.0}, 1, rng)[0] for _ in range(4000)])
    gamma0 = (
        2.0 * (1.0 + 2.0 * phi * theta + theta**2) / (1.0 - phi**2)
    )  # source: Box et al. (2015), ARMA(1,1) variance, sect. 3.4
    assert first.var() == pytest.approx(
        gamma0, rel=0.07
    )  # 4000 draws: relative s.e. of a variance is sqrt(2/4000) = 2.2%


def test_simulate_uses_given_innovations():
    """AR(1) with intercept: y_t - mu = phi (y_{t-1} - mu) + e_t exactly, for t >= 1."""
    spec = Arima(order=(1, 0, 0), trend="c")
    e = np.random.default_rng(1).normal(size=50)
    y = spec.simulate({"ar1": 0.5, "intercept": 10.0, "sigma2": 1.0}, 50, np.random.default_rng(2), innovations=e)
    np.testing.assert_allclose((y[1:] - 10.0) - 0.5 * (y[:-1] - 10.0), e[1:], atol=1e-12)  # source: the AR(1) recursion


def test_simulate_integrates_and_adds_drift_and_exog():
    """ARIMA(0,1,0) with drift and one input: y_t - y_{t-1} = drift + b (x_t - x_{t-1}) + e_t."""
    spec = Arima(order=(0, 1, 0), trend="t")
    x = np.linspace(0.0, 3.0, 40)
    e = np.random.default_rng(3).normal(size=40)
    y = spec.simulate(
        {"drift": 0.5, "x:x": 2.0, "sigma2": 1.0}, 40, np.random.default_rng(4), exog={"x": x}, innovations=e
    )
    np.testing.assert_allclose(
        np.diff(y), 0.5 + 2.0 * np.diff(x) + e[1:], atol=1e-12
    )  # source: the random-walk recursion


# -- residual identities ---------------------------------------------------------------------


@pytest.mark.parametrize("method", ["exact", "css"])
def test_errors_of_fitted_parameters_equal_the_residuals(method, macro):
    y = macro["consumption_growth"]
    exog = {"income": macro["income_growth"]}
    spec = Arima(order=(1, 1, 1), trend="t", method=method)
    fit = spec.fit(y, exog=exog)
    np.testing.assert_array_equal(
        spec.errors(y, fit.params, exog=exog), fit.residuals
    )  # source: residual identity (errors at the fitted parameters)
    assert fit.residuals.shape == y.shape and np.isnan(fit.residuals[0]) and np.isfinite(fit.residuals[1:]).all()
    if method == "exact":
        # sum v_t^2 / F_t is the quadratic form of the exact likelihood, whose mean is the ML sigma2
        # source: Box et al. (2015), ch. 7: the exact quadratic form is the sum of squared
        # standardised innovations (prediction-error decomposition)
        assert np.nanmean(fit.residuals**2) == pytest.approx(fit.sigma2, rel=1e-9)


def test_errors_on_a_longer_series_extend_the_fit_residuals(macro):
    """Frozen parameters on fit window + audit window: the fit-window part is unchanged."""
    y = macro["inflation"]
    spec = Arima(order=(1, 0, 1), trend="c")
    fit = spec.fit(y[:150])
    errors = spec.errors(y, fit.params)
    np.testing.assert_allclose(errors[:150], fit.residuals, atol=1e-12)  # source: the predictor uses the past only
    assert np.isfinite(errors[150:]).all()


# -- specification, protocol and registry ------------------------------------------------------


def test_description_names_and_protocol():
    spec = Arima(order=(1, 1, 1), seasonal=(0, 0, 1, 7), trend="t")
    assert spec.describe() == "ARIMA(1,1,1)(0,0,1)7 with drift"  # source: brief (describe format)
    assert spec.param_names(["temp_c"]) == [
        "ar1",
        "ma1",
        "sma1",
        "drift",
        "x:temp_c",
        "sigma2",
    ]  # source: docs/architecture.md §6
    assert spec.n_dynamic_params() == 3  # source: p + q + P + Q
    assert spec.seasonal_period() == 7  # source: the spec's s
    assert Arima(order=(1, 0, 0)).seasonal_period() == 1  # source: ForecastModel.seasonal_period (1 when non-seasonal)
    assert spec.has_location()  # source: the drift is the mean of the once-differenced series
    assert Arima(order=(1, 0, 0), trend="c").has_location()  # source: intercept
    assert not Arima(order=(1, 0, 0), trend="t").has_location()  # source: a slope without intercept fixes no level
    assert not Arima(order=(1, 0, 0)).has_location()  # source: no trend term
    assert Arima(order=(1, 0, 1), trend="c").min_length() == 5  # source: max(p*, q*) = 1 plus 4 parameters
    assert Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)).min_length() == 29  # source: 13 lost + q* = 13 + 3 parameters


def test_registry_and_round_trip_through_dict():
    spec = Arima(order=(2, 1, 0), seasonal=(1, 0, 0, 4), trend="t", method="css")
    assert get_family("arima") is Arima
    rebuilt = model_from_dict(spec.to_dict())
    assert rebuilt == spec and rebuilt.order == (2, 1, 0)
    fit = Arima(order=(1, 0, 0), trend="c").fit(np.random.default_rng(0).normal(size=50))
    assert fit.family == "arima" and fit.spec == Arima(order=(1, 0, 0), trend="c")
    assert fit.to_dict()["params"].keys() == fit.params.keys()


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"order": (1, 1, 0), "trend": "c"}, "intercept .* removed by the differencing .* Use trend='t' for a drift"),
        ({"order": (0, 1, 1), "seasonal": (0, 1, 1, 12), "trend": "t"}, r"drift .* removed by the differencing"),
        ({"seasonal": (1, 0, 0, 1)}, "need a period s >= 2"),
        ({"order": (1, 0)}, "must be 3 non-negative integers"),
        ({"order": (1, -1, 0)}, "must be 3 non-negative integers"),
        ({"trend": "linear"}, "The 'trend' parameter of Arima must be one of"),
        ({"method": "mle"}, "The 'method' parameter of Arima"),
    ],
)
def test_invalid_specifications_are_rejected(kwargs, match):
    with pytest.raises((SpecificationError, InputError), match=match):
        Arima(**kwargs)


# -- bad input --------------------------------------------------------------------------------------


def test_bad_series_raise_clear_errors():
    spec = Arima(order=(1, 0, 1), trend="c")
    with pytest.raises(InputError, match=r"ARIMA\(1,0,1\) with intercept: the series is constant"):
        spec.fit(np.full(50, 3.0))
    with pytest.raises(InputError, match="NaN or infinite value.*position 7"):
        spec.fit(np.r_[np.arange(7.0), np.nan, np.arange(40.0)])
    with pytest.raises(InputError, match="NaN or infinite"):
        spec.fit(np.r_[np.arange(7.0), np.inf, np.arange(40.0)])
    with pytest.raises(InsufficientDataError, match="has 4 observations but the model needs at least 5"):
        spec.fit(np.array([1.0, 2.0, 0.5, 3.0]))
    with pytest.raises(InsufficientDataError, match="13 are lost to differencing"):
        Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)).fit(np.random.default_rng(0).normal(size=25))
    with pytest.raises(InputError, match="exact function of the trend"):
        Arima(order=(0, 1, 1), trend="t").fit(2.0 + 0.5 * np.arange(30.0))


def test_bad_exogenous_inputs_raise_clear_errors():
    y = np.random.default_rng(0).normal(size=60)
    spec = Arima(order=(1, 0, 0), trend="c")
    with pytest.raises(InputError, match="exogenous column 'temp' has shape"):
        spec.fit(y, exog={"temp": np.ones(59)})
    with pytest.raises(InputError, match="exogenous column 'temp' has 1 missing"):
        spec.fit(y, exog={"temp": np.r_[np.nan, np.arange(59.0)]})
    with pytest.raises(SpecificationError, match=r"regressors \['x:level'\] vanish"):
        Arima(order=(1, 1, 0)).fit(y, exog={"level": np.ones(60)})
    with pytest.raises(SpecificationError, match="are collinear"):
        spec.fit(y, exog={"level": np.ones(60)})


def test_non_convergence_warns_and_flags():
    y = np.random.default_rng(5).normal(size=200).cumsum() * 0.1 + np.random.default_rng(6).normal(size=200)
    with pytest.warns(ConvergenceWarning, match=r"ARIMA\(2,0,2\) with intercept: the optimiser did not converge"):
        fit = Arima(order=(2, 0, 2), trend="c", maxiter=1).fit(y)
    assert fit.converged is False
    assert np.isfinite(fit.loglik) and np.isfinite(list(fit.params.values())).all()


def test_errors_reject_mismatched_or_invalid_parameters():
    y = np.random.default_rng(0).normal(size=80)
    spec = Arima(order=(1, 0, 1), trend="c")
    with pytest.raises(SpecificationError, match=r"do not match the spec; missing \['ma1'\]"):
        spec.errors(y, {"ar1": 0.5, "intercept": 0.0, "sigma2": 1.0})
    with pytest.raises(SpecificationError, match=r"unexpected \['x:temp'\]"):
        spec.errors(y, {"ar1": 0.5, "ma1": 0.1, "intercept": 0.0, "x:temp": 1.0, "sigma2": 1.0})
    with pytest.raises(
        SpecificationError, match="AR \\(ar\\*\\) coefficients \\[1.02\\] are not stationary.*add a difference"
    ):
        spec.errors(y, {"ar1": 1.02, "ma1": 0.1, "intercept": 0.0, "sigma2": 1.0})
    with pytest.raises(SpecificationError, match="MA \\(ma\\*\\) coefficients \\[-1.0\\] are not invertible.*Refit"):
        spec.errors(y, {"ar1": 0.5, "ma1": -1.0, "intercept": 0.0, "sigma2": 1.0})
    with pytest.raises(SpecificationError, match="NaN or infinite"):
        spec.errors(y, {"ar1": np.nan, "ma1": 0.1, "intercept": 0.0, "sigma2": 1.0})


def test_simulate_rejects_bad_arguments():
    spec = Arima(order=(1, 0, 0))
    rng = np.random.default_rng(0)
    with pytest.raises(SpecificationError, match="sigma2 must be positive"):
        spec.simulate({"ar1": 0.5, "sigma2": 0.0}, 10, rng)
    with pytest.raises(InputError, match="innovations must be 10 finite values"):
        spec.simulate({"ar1": 0.5, "sigma2": 1.0}, 10, rng, innovations=np.ones(9))
    with pytest.raises(SpecificationError, match="not stationary"):
        spec.simulate({"ar1": -1.5, "sigma2": 1.0}, 10, rng)


def test_fit_never_returns_silent_nan():
    """White noise with an over-specified ARMA(2,2): a finite, converged fit or a warning."""
    y = np.random.default_rng(11).normal(size=300)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit = Arima(order=(2, 0, 2), trend="c").fit(y)
    assert np.isfinite(fit.loglik) and np.isfinite(fit.residuals).all()
    assert fit.converged or any(issubclass(w.category, ConvergenceWarning) for w in caught)


@pytest.mark.parametrize(
    "spec, series",
    [
        ({"family": "arima", "order": [1, 1, 1]}, "nile"),
        ({"family": "smoothing", "trend": "add", "damped": True, "seasonal": "add", "period": 12}, "equipment"),
        ({"family": "nonlinear-ar", "function": "setar", "lags": [1, 2]}, "sunspots"),
    ],
)
def test_fits_without_standard_errors_are_the_same_fits(spec, series, nile_series, equipment_log, sunspot_series):
    """The audit fits with ``standard_errors=False``: every family then leaves ``extras["bse"]`` out
    and returns the same estimates, likelihood and residuals, bit for bit (packaged series)."""
    y = {"nile": nile_series, "equipment": equipment_log, "sunspots": sunspot_series}[series]
    model = model_from_dict(spec)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        full, lean = model.fit(y), model.fit(y, standard_errors=False)
    assert full.extras["bse"] and "bse" not in lean.extras
    assert lean.params == full.params and lean.loglik == full.loglik
    np.testing.assert_array_equal(lean.residuals, full.residuals)
    assert {k: v for k, v in full.extras.items() if k != "bse"} == lean.extras
