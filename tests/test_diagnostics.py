"""Independence checks (fitaudit.core.diagnostics) against statsmodels and its packaged data."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from fitaudit.core.diagnostics import (
    acf,
    acf_band,
    chi2_sf,
    ljung_box,
    ljung_box_batch,
    ljung_box_lags,
    mcleod_li,
)
from fitaudit.core.exceptions import InputError, InsufficientDataError

sm_stattools = pytest.importorskip("statsmodels.tsa.stattools")
sm_diagnostic = pytest.importorskip("statsmodels.stats.diagnostic")


@pytest.fixture(scope="module")
def sunspots() -> np.ndarray:
    from statsmodels.datasets import sunspots

    return sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(dtype=float)


@pytest.fixture(scope="module")
def sunspot_residuals(sunspots) -> np.ndarray:
    from statsmodels.tsa.arima.model import ARIMA

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return np.asarray(ARIMA(sunspots, order=(1, 0, 1)).fit().resid)


def _statsmodels_lb(x, lags, model_df=0):
    out = sm_diagnostic.acorr_ljungbox(x, lags=[lags], model_df=model_df, return_df=True)
    return float(out["lb_stat"].iloc[0]), float(out["lb_pvalue"].iloc[0])


# --------------------------------------------------------------------------------------------
# Autocorrelation
# --------------------------------------------------------------------------------------------
def test_acf_matches_statsmodels_on_sunspots(sunspots):
    ours = acf(sunspots, 40)
    ref = sm_stattools.acf(sunspots, nlags=40, adjusted=False, fft=False)  # source: statsmodels acf, sunspots data
    np.testing.assert_allclose(ours, ref, rtol=1e-12, atol=1e-14)


@settings(max_examples=30, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), n=st.integers(5, 120), frac=st.floats(0.05, 0.95))
def test_acf_matches_statsmodels_random(seed, n, frac):
    x = np.random.default_rng(seed).standard_normal(n).cumsum()
    nlags = max(1, int(frac * (n - 1)))
    ref = sm_stattools.acf(x, nlags=nlags, adjusted=False, fft=False)  # source: statsmodels acf
    np.testing.assert_allclose(acf(x, nlags), ref, rtol=1e-10, atol=1e-12)


def test_acf_band():
    # source: scipy.stats.norm.ppf(0.975) = 1.959964 (standard normal quantile)
    assert acf_band(100) == pytest.approx(stats.norm.ppf(0.975) / 10.0, rel=1e-14)
    assert acf_band(400, level=0.99) == pytest.approx(stats.norm.ppf(0.995) / 20.0, rel=1e-14)


# --------------------------------------------------------------------------------------------
# Ljung-Box and McLeod-Li
# --------------------------------------------------------------------------------------------
def test_ljung_box_sunspots_published(sunspot_residuals):
    res = ljung_box(sunspot_residuals, 10)
    # source: statsmodels acorr_ljungbox docstring (sunspots, ARMA(1,1), lags=[10]) lb_stat 214.106992
    # (old ARMA class); 214.108693 with statsmodels' current ARIMA estimator (docs/method.md §13.4)
    assert res.statistic == pytest.approx(214.106992, rel=1e-4)
    assert res.statistic == pytest.approx(214.108693, rel=1e-6)
    assert res.p_value == pytest.approx(
        1.825878e-40, rel=1e-3
    )  # source: statsmodels, current ARIMA (docs/method.md §13.4, df 10)
    with_df = ljung_box(sunspot_residuals, 10, model_df=2)
    assert with_df.df == 8
    assert with_df.p_value == pytest.approx(
        6.757340e-42, rel=1e-3
    )  # source: statsmodels, current ARIMA (docs/method.md §13.4, model_df = 2)


@pytest.mark.parametrize("lags,model_df", [(10, 0), (10, 2), (5, 2), (24, 3)])
def test_ljung_box_equals_statsmodels_on_same_vector(sunspot_residuals, lags, model_df):
    res = ljung_box(sunspot_residuals, lags, model_df=model_df)
    ref_stat, ref_p = _statsmodels_lb(sunspot_residuals, lags, model_df)  # source: statsmodels acorr_ljungbox
    assert res.statistic == pytest.approx(ref_stat, rel=1e-10)
    assert res.p_value == pytest.approx(ref_p, rel=1e-8)
    assert (res.name, res.lags, res.df, res.n) == ("ljung-box", lags, lags - model_df, len(sunspot_residuals))


def test_mcleod_li_equals_ljung_box_on_centred_squares(sunspot_residuals):
    res = mcleod_li(sunspot_residuals, 12)
    sq = sunspot_residuals**2
    ref_stat, ref_p = _statsmodels_lb(
        sq - sq.mean(), 12
    )  # source: statsmodels acorr_ljungbox on centred squares (McLeod & Li 1983)
    assert res.statistic == pytest.approx(ref_stat, rel=1e-10)
    assert res.p_value == pytest.approx(ref_p, rel=1e-8)
    assert (res.name, res.df) == ("mcleod-li", 12)


def test_ljung_box_batch_equals_rowwise(rng):
    X = rng.standard_normal((6, 80))
    X[:, 1:] += 0.3 * X[:, :-1]
    q, p = ljung_box_batch(X, 8, model_df=1)
    for r in range(6):
        ref_stat, ref_p = _statsmodels_lb(X[r], 8, 1)  # source: statsmodels acorr_ljungbox
        assert q[r] == pytest.approx(ref_stat, rel=1e-10)
        assert p[r] == pytest.approx(ref_p, rel=1e-8)


def test_ljung_box_size_under_white_noise():
    rng = np.random.default_rng(16)
    _, p = ljung_box_batch(rng.standard_normal((4000, 200)), 10)
    # source: Ljung & Box (1978): Q is approximately chi-square(h) for white noise; seeded, wide band
    assert 0.035 <= np.mean(p < 0.05) <= 0.065


def test_leading_nan_dropped_interior_nan_rejected(rng):
    x = rng.standard_normal(60)
    padded = np.concatenate([[np.nan, np.nan], x])
    assert ljung_box(padded, 6) == ljung_box(x, 6)
    np.testing.assert_array_equal(acf(padded, 5), acf(x, 5))
    broken = padded.copy()
    broken[30] = np.nan
    with pytest.raises(InputError, match="position 30"):
        ljung_box(broken, 6)
    with pytest.raises(InputError, match="position 62"):
        mcleod_li(np.append(padded, np.nan), 6)


def test_ljung_box_argument_errors(rng):
    x = rng.standard_normal(30)
    with pytest.raises(InputError, match="must exceed model_df"):
        ljung_box(x, 3, model_df=3)
    with pytest.raises(InsufficientDataError, match="at least 31 residuals"):
        ljung_box(x, 30)
    with pytest.raises(InputError, match="constant"):
        ljung_box(np.ones(30), 5)


# --------------------------------------------------------------------------------------------
# The lag rule
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("n,period", [(30, 1), (60, 1), (200, 1), (500, 1), (144, 12), (40, 7), (1000, 52)])
def test_ljung_box_lags_match_statsmodels_default(n, period, rng):
    x = rng.standard_normal(n)
    kwargs = {} if period == 1 else {"period": period}
    ref = sm_diagnostic.acorr_ljungbox(
        x, return_df=True, **kwargs
    ).index.max()  # source: statsmodels acorr_ljungbox default lags
    expected = max(ref, 3)  # docs/method.md §9.2: at least model_df + 3
    assert ljung_box_lags(n, period=period) == expected


def test_ljung_box_lags_degrees_of_freedom():
    # source: docs/method.md §9.2 (h at least df + 3)
    assert ljung_box_lags(40, model_df=7) == 10
    assert ljung_box_lags(200, model_df=2) == 10
    with pytest.raises(InsufficientDataError, match="at least 11 residuals"):
        ljung_box_lags(10, model_df=7)


def test_result_to_dict(rng):
    d = ljung_box(rng.standard_normal(50), 5).to_dict()
    assert set(d) == {"name", "statistic", "lags", "df", "p_value", "convention", "n"}
    assert d["name"] == "ljung-box" and d["lags"] == 5


def test_chi2_sf_is_scipys_chi2_sf_for_every_argument():
    """The chi-square tail the p-values use (without scipy.stats' distribution object) equals
    scipy.stats.chi2.sf exactly: negative, zero, tiny, ordinary, far-tail, infinite and NaN values."""
    rng = np.random.default_rng(3)
    x = np.r_[-2.0, -1e-15, 0.0, 1e-300, rng.gamma(2.0, 6.0, 500), 300.0, 5e3, np.inf, np.nan]
    for df in (1, 2, 5, 10, 27, 120):
        expected = np.array([stats.chi2.sf(v, df) for v in x])  # source: scipy.stats.chi2
        np.testing.assert_array_equal(chi2_sf(x, df), expected)
