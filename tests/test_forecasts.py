"""Forecast audits (fitaudit.core.forecasts): PIT values, quantile interpolation, scores, the
lagged independence gate, bad inputs, and seeded size and power.

References: scipy's distribution functions; properscoring and scoringrules (test-only scoring
libraries) for the CRPS; statsmodels for the Ljung-Box statistic; Dawid (1984), Diebold, Gunther
and Tay (1998) and Czado, Gneiting and Held (2009) for PIT uniformity under correct forecasts;
Hyndman and Koehler (2006) for the definition of MASE.
"""

from __future__ import annotations

import dataclasses
import json
import math

import numpy as np
import pytest
from scipy import integrate, stats

from fitaudit.core.audit import AuditResult, AuditSettings, apply_fleet_rules, audit_series
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.diagnostics import ljung_box
from fitaudit.core.exceptions import InputError
from fitaudit.core.forecasts import (
    NOT_REFITTED,
    audit_forecasts,
    check_forecast_timing,
    crps_counts,
    crps_location_scale,
    crps_normal,
    crps_quantiles,
    lagged_ljung_box,
    mase,
    pit_counts,
    pit_location_scale,
    pit_quantiles,
    quantile_cdf,
    simulate_lagged_ljung_box,
)
from fitaudit.core.models import Arima

properscoring = pytest.importorskip("properscoring")
scoringrules = pytest.importorskip("scoringrules")

FAST = AuditSettings(replicates=199, locate_change=False)
LEVELS = tuple(round(0.05 * k, 2) for k in range(1, 20))  # 0.05 ... 0.95, the example grid


# --------------------------------------------------------------------------------------------
# PIT values
# --------------------------------------------------------------------------------------------
def test_pit_normal_hand_worked():
    u = pit_location_scale([12.0, 10.0, 7.0], mean=[10.0, 10.0, 10.0], scale=2.0)
    # source: standard normal table, Phi(1) = 0.8413447461, Phi(0) = 0.5, Phi(-1.5) = 0.0668072013
    # (Abramowitz and Stegun 1964, table 26.1); scipy.stats.norm.cdf agrees
    np.testing.assert_allclose(u, [0.8413447461, 0.5, 0.0668072013], atol=1e-10)
    np.testing.assert_allclose(u, stats.norm.cdf([1.0, 0.0, -1.5]), rtol=1e-14)


def test_pit_student_t_hand_worked():
    # standard deviation sqrt(5/3) is a t(5) scale of 1, so the t table applies directly
    u = pit_location_scale(
        [2.015, -3.365], mean=[0.0, 0.0], scale=math.sqrt(5 / 3), noise={"law": "student-t", "shape": 5}
    )
    # source: Student's t table, 5 d.f.: t(0.95) = 2.015, t(0.99) = 3.365 (Abramowitz and Stegun 1964, table 26.10)
    np.testing.assert_allclose(u, [0.95, 0.01], atol=2e-4)
    np.testing.assert_allclose(u, stats.t.cdf([2.015, -3.365], 5), rtol=1e-12)  # source: scipy.stats.t


@pytest.mark.parametrize(
    "law, ref",
    [
        (
            "laplace",
            lambda y, m, sd: stats.laplace.cdf(y, m, sd / math.sqrt(2)),
        ),  # source: scipy.stats.laplace, var = 2 b^2
        (
            "logistic",
            lambda y, m, sd: stats.logistic.cdf(y, m, sd * math.sqrt(3) / math.pi),
        ),  # source: scipy, var = pi^2 s^2 / 3
    ],
)
def test_pit_other_location_scale_laws_match_scipy(law, ref):
    y = np.array([-1.0, 0.3, 2.5, 9.0])
    mean = np.array([0.0, 0.5, 1.0, 4.0])
    sd = np.array([1.0, 0.5, 2.0, 3.0])
    np.testing.assert_allclose(pit_location_scale(y, mean, sd, law), ref(y, mean, sd), rtol=1e-12)


def test_pit_poisson_randomised_hand_worked():
    rng_a, rng_b = np.random.default_rng(7), np.random.default_rng(7)
    u = pit_counts([3.0], [2.0], "poisson", rng_a)
    # hand-worked: F(2) = e^-2 (1 + 2 + 2) = 0.6766764, P(3) = e^-2 2^3 / 3! = 0.1804470
    below, mass = 5 * math.exp(-2), 8 / 6 * math.exp(-2)
    assert below == pytest.approx(stats.poisson.cdf(2, 2.0), rel=1e-14)  # source: scipy.stats.poisson
    assert mass == pytest.approx(stats.poisson.pmf(3, 2.0), rel=1e-14)
    v = rng_b.uniform(size=1)[0]
    assert u[0] == pytest.approx(below + v * mass, rel=1e-12)
    assert below <= u[0] <= below + mass


def test_pit_negative_binomial_matches_scipy():
    y = np.array([0.0, 4.0, 11.0])
    mean = np.array([2.0, 3.5, 6.0])
    size = 3.0
    u = pit_counts(y, mean, {"law": "negative-binomial", "shape": size}, np.random.default_rng(3))
    p = size / (size + mean)
    lo = np.where(
        y > 0, stats.nbinom.cdf(y - 1, size, p), 0.0
    )  # source: scipy.stats.nbinom (n = size, p = size / (size + mean))
    hi = stats.nbinom.cdf(y, size, p)
    assert np.all((lo - 1e-12 <= u) & (u <= hi + 1e-12))


# --------------------------------------------------------------------------------------------
# Quantile-stated forecasts
# --------------------------------------------------------------------------------------------
def test_quantile_interpolation_hand_worked():
    q = {0.1: [10.0] * 5, 0.5: [20.0] * 5, 0.9: [30.0] * 5}
    u = quantile_cdf([15.0, 27.5, 20.0, 5.0, 35.0], q)
    # hand-worked: linear between (10, 0.1), (20, 0.5), (30, 0.9):
    #   15 -> 0.1 + 0.4 * 0.5 = 0.3;  27.5 -> 0.5 + 0.4 * 0.75 = 0.8;  20 -> 0.5
    # exponential tails through the two outer quantiles on each side, b = 10 / log 5:
    #   5 -> 0.1 exp(-5 log 5 / 10) = 0.1 / sqrt 5;  35 -> 1 - 0.1 / sqrt 5
    np.testing.assert_allclose(u, [0.3, 0.8, 0.5, 0.1 / math.sqrt(5), 1 - 0.1 / math.sqrt(5)], rtol=1e-12)
    np.testing.assert_allclose(pit_quantiles([15.0, 27.5], {k: v[:2] for k, v in q.items()}), [0.3, 0.8], rtol=1e-12)


def test_exponential_tail_reproduces_a_laplace_law():
    """The tail through the two outermost quantiles is exact for a Laplace predictive law."""
    levels = [0.05, 0.1, 0.5, 0.9, 0.95]
    q = {lv: [stats.laplace.ppf(lv, 3.0, 2.0)] * 4 for lv in levels}  # source: scipy.stats.laplace
    x = np.array([-10.0, -2.0, 9.0, 20.0])  # all beyond the outer quantiles
    np.testing.assert_allclose(quantile_cdf(x, q), stats.laplace.cdf(x, 3.0, 2.0), rtol=1e-10)


def test_tied_quantiles_randomise_within_the_jump():
    q = {0.1: [0.0] * 3, 0.5: [0.0] * 3, 0.9: [2.0] * 3}
    # hand-worked: the 0.1 and 0.5 quantiles are both 0, so F jumps from 0.1 to 0.5 at 0 (the
    # left limit comes from the lower tail, tau_1 = 0.1); without a generator the PIT is the midpoint
    np.testing.assert_allclose(pit_quantiles([0.0, 1.0, 0.0], q)[:2], [0.3, 0.7], rtol=1e-12)
    u = pit_quantiles(np.zeros(2000), {k: [v[0]] * 2000 for k, v in q.items()}, rng=np.random.default_rng(0))
    assert u.min() >= 0.1 and u.max() <= 0.5
    # common practice: randomised within the jump, the PIT is uniform on [0.1, 0.5]
    assert stats.kstest((u - 0.1) / 0.4, "uniform").pvalue > 0.001


def test_stated_median_is_the_point_forecast_for_mase():
    rng = np.random.default_rng(5)
    n = 120
    y = 50 + rng.standard_normal(n)
    q = {lv: np.full(n, 50 + stats.norm.ppf(lv)) for lv in (0.1, 0.25, 0.75, 0.9)}  # no 0.5 level stated
    res = audit_forecasts(y, quantiles=q, settings=FAST)
    # the median interpolated between the 0.25 and 0.75 quantiles is exactly 50 (symmetric levels)
    assert res.accuracy["mae"] == pytest.approx(np.mean(np.abs(y[-56:] - 50.0)), rel=1e-12)


# --------------------------------------------------------------------------------------------
# PIT uniformity under correct forecasts (Dawid 1984; Diebold, Gunther and Tay 1998)
# --------------------------------------------------------------------------------------------
def test_pit_is_uniform_under_correct_predictive_laws():
    rng = np.random.default_rng(11)
    n = 3000
    mean = rng.normal(100, 10, n)
    sd = rng.uniform(1, 5, n)
    y = mean + sd * rng.standard_normal(n)
    u_normal = pit_location_scale(y, mean, sd)
    nu = 4.0
    yt = mean + sd * math.sqrt((nu - 2) / nu) * rng.standard_t(nu, n)
    u_t = pit_location_scale(yt, mean, sd, {"law": "student-t", "shape": nu})
    mu = rng.uniform(0.5, 6, n)
    yc = rng.poisson(mu).astype(float)
    u_counts = pit_counts(yc, mu, "poisson", np.random.default_rng(12))
    q = {lv: mean + sd * stats.norm.ppf(lv) for lv in LEVELS}
    u_quant = pit_quantiles(y, q, np.random.default_rng(13))
    # source: Dawid (1984), Diebold, Gunther and Tay (1998): u_t = F_t(y_t) is i.i.d. U(0, 1) when
    # the F_t are the true predictive laws; Czado et al. (2009) for the randomised count PIT.
    # Kolmogorov-Smirnov at 0.001 (common practice for a seeded check)
    for u in (u_normal, u_t, u_counts, u_quant):
        assert stats.kstest(u, "uniform").pvalue > 0.001
    # and it detects a wrong one: the plain (non-randomised) count PIT F_t(y_t) is not uniform
    assert stats.kstest(stats.poisson.cdf(yc, mu), "uniform").pvalue < 1e-6


# --------------------------------------------------------------------------------------------
# Scores
# --------------------------------------------------------------------------------------------
def test_crps_normal_closed_form_and_references():
    y = np.array([0.0, 1.3, -2.0, 10.0])
    mu = np.array([0.0, 0.5, 1.0, 9.0])
    sd = np.array([1.0, 2.0, 0.7, 3.0])
    ours = crps_normal(y, mu, sd)
    # source: Gneiting and Raftery (2007):
    # CRPS(N(0, 1), 0) = 2 phi(0) - 1/sqrt(pi) = (sqrt 2 - 1) / sqrt(pi) = 0.2336950
    assert ours[0] == pytest.approx((math.sqrt(2) - 1) / math.sqrt(math.pi), rel=1e-14)
    # source: properscoring.crps_gaussian and scoringrules.crps_normal
    np.testing.assert_allclose(ours, properscoring.crps_gaussian(y, mu=mu, sig=sd), rtol=1e-12)
    np.testing.assert_allclose(ours, scoringrules.crps_normal(y, mu, sd), rtol=1e-10)
    # source: the definition CRPS = int (F(x) - 1{x >= y})^2 dx, by scipy.integrate.quad
    for yi, mi, si, ci in zip(y, mu, sd, ours):
        left = integrate.quad(lambda x, m, s: stats.norm.cdf(x, m, s) ** 2, -np.inf, yi, args=(mi, si))[0]
        right = integrate.quad(lambda x, m, s: stats.norm.sf(x, m, s) ** 2, yi, np.inf, args=(mi, si))[0]
        assert ci == pytest.approx(left + right, rel=1e-8)


def test_crps_of_other_laws_against_scoringrules():
    y = np.array([-1.0, 0.3, 2.5, 9.0])
    mu = np.array([0.0, 0.5, 1.0, 4.0])
    sd = np.array([1.0, 0.5, 2.0, 3.0])
    # source: scoringrules.crps_laplace / crps_logistic / crps_t (closed forms of Jordan et al. 2019)
    lap = scoringrules.crps_laplace(y, mu, sd / math.sqrt(2))
    np.testing.assert_allclose(crps_location_scale(y, mu, sd, "laplace"), lap, rtol=1e-10)
    logi = scoringrules.crps_logistic(y, mu, sd * math.sqrt(3) / math.pi)
    np.testing.assert_allclose(crps_location_scale(y, mu, sd, "logistic"), logi, rtol=1e-10)
    nu = 5.0
    t_ref = scoringrules.crps_t(y, nu, mu, sd * math.sqrt((nu - 2) / nu))
    np.testing.assert_allclose(crps_location_scale(y, mu, sd, {"law": "student-t", "shape": nu}), t_ref, rtol=1e-8)


def test_crps_of_count_laws_against_scoringrules():
    y = np.array([0.0, 3.0, 7.0, 25.0])
    mu = np.array([0.5, 3.0, 4.2, 18.0])
    # source: scoringrules.crps_poisson and crps_negbinom
    np.testing.assert_allclose(crps_counts(y, mu, "poisson"), scoringrules.crps_poisson(y, mu), rtol=1e-7)
    size = 2.5
    nb = scoringrules.crps_negbinom(y, size, mu=mu)
    np.testing.assert_allclose(crps_counts(y, mu, {"law": "negative-binomial", "shape": size}), nb, rtol=1e-6)


def test_crps_quantiles_against_scoringrules_and_the_normal_crps():
    rng = np.random.default_rng(2)
    n = 50
    mu, sd = rng.normal(0, 3, n), rng.uniform(0.5, 2, n)
    y = mu + sd * rng.standard_normal(n)
    q = {lv: mu + sd * stats.norm.ppf(lv) for lv in LEVELS}
    ours = crps_quantiles(y, q)
    fct = np.column_stack([q[lv] for lv in LEVELS])
    # source: scoringrules.crps_quantile (Berrisch and Ziel 2023: 2/|Q| sum of pinball losses)
    np.testing.assert_allclose(ours, scoringrules.crps_quantile(y, fct, np.array(LEVELS)), rtol=1e-10)
    # common practice: with 99 levels the approximation approaches the closed form (Laio and Tamea 2007 integral)
    fine = tuple(k / 100 for k in range(1, 100))
    q99 = {lv: mu + sd * stats.norm.ppf(lv) for lv in fine}
    assert np.mean(crps_quantiles(y, q99)) == pytest.approx(np.mean(crps_normal(y, mu, sd)), rel=0.03)


def test_mase_hand_worked():
    # hand-worked from the definition of Hyndman and Koehler (2006, section 3.4), not a published number:
    # history 10, 12, 11, 13, 12: naive absolute errors 2, 1, 2, 1 -> Q = 1.5;
    # actuals 14, 13 with forecasts 13, 13.5: absolute errors 1, 0.5 -> MAE 0.75 -> MASE 0.5
    assert mase([14.0, 13.0], [13.0, 13.5], period=1, history=[10.0, 12.0, 11.0, 13.0, 12.0]) == pytest.approx(
        0.5, rel=1e-14
    )
    # seasonal, m = 2: history 10, 20, 12, 21, 11, 23: |12-10|, |21-20|, |11-12|, |23-21| -> Q = 1.5;
    # one actual 14 forecast as 11 -> MASE 2
    assert mase([14.0], [11.0], period=2, history=[10.0, 20.0, 12.0, 21.0, 11.0, 23.0]) == pytest.approx(2.0, rel=1e-14)
    # source: Hyndman and Koehler (2006): the in-sample one-step naive forecast has MASE exactly 1
    x = np.random.default_rng(4).standard_normal(40).cumsum()
    assert mase(x[1:], x[:-1], period=1, history=x) == pytest.approx(1.0, rel=1e-14)


# --------------------------------------------------------------------------------------------
# Independence beyond the horizon
# --------------------------------------------------------------------------------------------
def test_lagged_ljung_box_from_lag_one_is_ljung_box():
    x = np.random.default_rng(8).standard_normal(150)
    ours = lagged_ljung_box(x, start=1, lags=10)
    ref = ljung_box(x, 10)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
    sm = pytest.importorskip("statsmodels.stats.diagnostic")
    out = sm.acorr_ljungbox(x, lags=[10], return_df=True)  # source: statsmodels acorr_ljungbox
    assert ours.statistic == pytest.approx(float(out["lb_stat"].iloc[0]), rel=1e-10)
    assert ours.p_value == pytest.approx(float(out["lb_pvalue"].iloc[0]), rel=1e-10)


def _three_step_random_walk_errors(rng, n):
    """e_t + e_(t-1) + e_(t-2): MA(2) with autocorrelations 2/3 and 1/3, none beyond lag 2."""
    e = rng.standard_normal(n + 2)
    return e[2:] + e[1:-1] + e[:-2]


def test_lagged_ljung_box_is_bartlett_corrected():
    """Beyond lag 2 the 3-step errors are uncorrelated: the corrected statistic reaches its
    chi-square(10) limit in long series, while the plain Ljung-Box over lags 3..12 (identity
    weights) is far too liberal."""
    rng = np.random.default_rng(21)
    reps, n, lags = 300, 1000, 10
    corrected = plain = 0
    for _ in range(reps):
        x = _three_step_random_walk_errors(rng, n)
        corrected += lagged_ljung_box(x, 3, lags).p_value <= 0.05
        r = np.array([np.corrcoef(x[:-k], x[k:])[0, 1] for k in range(3, 3 + lags)])
        plain += stats.chi2.sf(n * (n + 2) * np.sum(r**2 / (n - np.arange(3, 3 + lags))), lags) <= 0.05
    # common practice: 300 replicates, binomial sd 0.013 -> [0.015, 0.09]
    assert 0.015 <= corrected / reps <= 0.09
    # source: Bartlett (1946): Var(r_k) = (1 + 2 (4/9 + 1/9)) / n for k > 2, about twice 1/n
    assert plain / reps > 0.25


def test_simulated_null_of_the_lagged_statistic_at_audit_window_lengths():
    """At 90 observations the chi-square limit is liberal; the simulated MA(2) null is closer."""
    rng = np.random.default_rng(22)
    reps, n, lags = 300, 90, 10
    simulated = limit = 0
    for i in range(reps):
        x = _three_step_random_walk_errors(rng, n)
        q = lagged_ljung_box(x, 3, lags)
        null = simulate_lagged_ljung_box(x, 3, lags, 199, np.random.default_rng(i))
        simulated += (1 + np.sum(null >= q.statistic)) / 200 <= 0.05
        limit += q.p_value <= 0.05
    # common practice: 300 replicates, binomial sd 0.013; docs/validation.md measures it more finely
    assert 0.015 <= simulated / reps <= 0.10
    assert simulated <= limit  # never more liberal than the chi-square limit here


def test_simulated_lagged_null_from_lag_one_is_the_iid_null():
    x = np.random.default_rng(3).standard_normal(60)
    null = simulate_lagged_ljung_box(x, 1, 10, 999, np.random.default_rng(4))
    # source: for i.i.d. series the Ljung-Box statistic is close to chi-square(10) (Ljung and Box 1978);
    # its 95 % point 18.31 (scipy.stats.chi2.ppf); common practice: within 15 % at n = 60
    assert np.quantile(null, 0.95) == pytest.approx(stats.chi2.ppf(0.95, 10), rel=0.15)


# --------------------------------------------------------------------------------------------
# The audit
# --------------------------------------------------------------------------------------------
def _normal_case(seed, n=150, bias=0.0, stated_sd=1.0):
    rng = np.random.default_rng(seed)
    mean = 20 + 3 * np.sin(np.arange(n) * 2 * np.pi / 7)
    y = mean + rng.standard_normal(n)
    return y, mean + bias, stated_sd


def test_audit_result_shape_and_json():
    y, mean, sd = _normal_case(1)
    res = audit_forecasts(y, mean=mean, scale=sd, period=7, settings=FAST, label="supplier-north")
    assert isinstance(res, AuditResult) and res.refit is None and res.production.ok
    assert res.verdict == "pass" and NOT_REFITTED in res.reasons
    assert res.spec == {
        "family": "forecasts",
        "horizon": 1,
        "period": 7,
        "statement": "mean-scale",
        "noise": {"law": "normal", "shape": None},
    }
    assert res.production.window == {"first": 150 - 56, "last": 149, "length": 56, "horizon": 1}
    p = res.production
    assert p.p_value == pytest.approx(min(1.0, 2 * min(p.p_distribution, p.p_independence)))
    assert set(res.accuracy) >= {"mase", "crps", "crps_naive", "crps_skill", "mae"}
    # the true predictive law beats the seasonal naive forecast (common practice: a skill score above 0)
    assert res.accuracy["crps_skill"] > 0
    doc = res.to_dict()
    assert doc["refit"] is None and doc["accuracy"]["crps"] == pytest.approx(res.accuracy["crps"])
    json.dumps(doc, allow_nan=False)
    # fitted models keep their results shape: no accuracy key
    fitted = audit_series(y, Arima(order=(1, 0, 0), trend="c"), settings=FAST)
    assert "accuracy" not in fitted.to_dict()


def test_one_step_check_equals_the_production_check_of_the_same_errors():
    """Forecasts y_t - e_t with standard deviation sigma give the production check's PIT values
    Phi(e_t / sigma) and the same autocorrelations, hence the same p-values (an identity)."""
    spec = Arima(order=(1, 0, 0), trend="c")
    truth = {"ar1": 0.6, "intercept": 10.0, "sigma2": 2.0}
    y = spec.simulate(truth, 160, np.random.default_rng(3))
    settings = dataclasses.replace(FAST, locate_change=False)
    cache = CalibrationCache()
    fitted = audit_series(y, spec, production=truth, settings=settings, cache=cache)
    e = spec.production_errors(y, truth)
    fc = audit_forecasts(y, mean=y - e, scale=math.sqrt(2.0), settings=settings, cache=cache)
    assert fc.production.counts == fitted.production.counts
    assert fc.production.p_distribution == pytest.approx(fitted.production.p_distribution, abs=1e-12)
    assert fc.production.p_independence == pytest.approx(fitted.production.p_independence, abs=1e-12)


def test_reruns_reproduce_every_number_including_randomised_pits():
    rng = np.random.default_rng(9)
    mu = rng.uniform(2, 8, 100)
    y = rng.poisson(mu).astype(float)
    a = audit_forecasts(y, mean=mu, noise="poisson", settings=FAST)
    b = audit_forecasts(y, mean=mu, noise="poisson", settings=FAST)
    assert json.dumps(a.to_dict()) == json.dumps(b.to_dict())
    c = audit_forecasts(y, mean=mu, noise="poisson", settings=dataclasses.replace(FAST, seed=1))
    assert c.production.counts != a.production.counts  # another seed, other randomisation


def test_understated_scale_fails_with_a_plain_reason():
    y, mean, _ = _normal_case(2, n=200)
    res = audit_forecasts(
        y, mean=mean, scale=0.4, settings=dataclasses.replace(FAST, locate_change=True), label="vendor-east"
    )
    assert res.verdict == "refit"
    assert "no longer match their stated uncertainty" in res.reasons[0] and "should re-estimate" in res.reasons[0]
    assert "standard deviation" in res.reasons[0] and res.production.noise["score_sd"] > 1.5
    assert res.reasons[1] == NOT_REFITTED
    assert res.change is not None and 200 - 56 <= res.change.index < 200  # a position in the series


def test_fleet_rules_adjust_and_escalate_forecast_audits():
    good = audit_forecasts(*_normal_case(3), settings=FAST)
    y, mean, _ = _normal_case(4)
    bad = audit_forecasts(y, mean=mean, scale=0.4, settings=FAST)
    out = apply_fleet_rules([good, bad], histories=[(), ("pass", "refit")])
    assert out[0].verdict == "pass" and out[0].production.p_adjusted is not None
    # a refit in 2 of the last 3 audits escalates to respecify, as for fitted models
    assert out[1].verdict == "respecify" and out[1].escalated
    assert any("escalated" in r for r in out[1].reasons) and NOT_REFITTED in out[1].reasons


def test_three_step_forecasts_use_subsequences_and_lags_beyond_the_horizon():
    rng = np.random.default_rng(6)
    n = 200
    e = rng.standard_normal(n + 2)
    mean = np.full(n, 5.0)
    y = mean + e[2:] + e[1:-1] + e[:-2]  # correct 3-step errors of a random walk: MA(2), variance 3
    res = audit_forecasts(
        y, mean=mean, scale=math.sqrt(3.0), horizon=3, settings=dataclasses.replace(FAST, audit_window=90)
    )
    assert res.production.ok, res.reasons
    lb = res.production.ljung_box
    assert lb["first_lag"] == 3 and lb["lags"] == 10 and "Bartlett" in lb["convention"]
    subs = res.production.calibration["subsequences"]
    assert [s["n"] for s in subs] == [30, 30, 30]
    assert res.production.p_distribution == pytest.approx(min(1.0, 3 * min(s["p_distribution"] for s in subs)))
    assert "lags 3..12" in res.reasons[0]
    # 56 observations give subsequences of 18-19 values, fewer than the 20 the cells need
    short = audit_forecasts(y, mean=mean, scale=math.sqrt(3.0), horizon=3, settings=FAST)
    assert short.verdict == "insufficient"


# --------------------------------------------------------------------------------------------
# Bad inputs: a clear error verdict, never an exception
# --------------------------------------------------------------------------------------------
def _quantiles(changes=None, n=100):
    base = {lv: np.full(n, 10 + stats.norm.ppf(lv)) for lv in (0.1, 0.5, 0.9)}
    base.update(changes or {})
    return base


@pytest.mark.parametrize(
    "kwargs, words",
    [
        (dict(quantiles=_quantiles({0.5: None})), ["0.5 quantile column is missing", "state it"]),
        (
            dict(quantiles=_quantiles({0.5: np.r_[np.full(99, 10.0), np.nan]})),
            ["0.5 quantile is missing", "position 99", "Fill the forecast store"],
        ),
        (
            dict(quantiles=_quantiles({0.5: np.full(100, 20.0)})),
            ["quantiles cross", "0.9 quantile", "below the 0.5 quantile"],
        ),
        (dict(quantiles=_quantiles({5: np.full(100, 10.0)})), ["level 5", "between 0 and 1"]),
        (dict(quantiles=_quantiles({0.5: np.full(80, 10.0)})), ["shape (80,)", "100 values"]),
        (dict(quantiles={0.5: np.full(100, 10.0)}), ["at least two levels"]),
        (dict(mean=np.full(100, 10.0), scale=0.0), ["predictive scale must be positive", "position 44"]),
        (
            dict(mean=np.full(100, 10.0), scale=np.r_[np.ones(99), -2.0]),
            ["predictive scale must be positive", "position 99"],
        ),
        (dict(mean=np.full(90, 10.0), scale=1.0), ["predictive mean has shape (90,)"]),
        (dict(mean=np.full(100, 10.0)), ["needs its scale"]),
        (dict(mean=np.full(100, 10.0), scale=1.0, noise="student-t"), ["needs its shape"]),
        (dict(mean=np.full(100, 10.0), scale=1.0, noise="poisson"), ["takes no scale"]),
        (dict(mean=np.full(100, 10.0), scale=1.0, quantiles=_quantiles()), ["one way"]),
        (dict(), ["no forecasts stated"]),
        (dict(mean=np.full(100, 10.0), scale=1.0, horizon=0), ["'horizon'"]),
    ],
)
def test_bad_forecasts_get_an_error_verdict_naming_the_model_and_the_fix(kwargs, words):
    y = 10 + np.random.default_rng(1).standard_normal(100)
    res = audit_forecasts(y, settings=FAST, label="supplier-7", **kwargs)
    assert res.verdict == "error", res.reasons
    assert res.refit is None and not res.production.ok
    msg = res.production.message
    assert msg.startswith("supplier-7: ") or "supplier-7" in msg
    for w in words:
        assert w in msg, (w, msg)
    json.dumps(res.to_dict(), allow_nan=False)


def test_counts_under_a_count_law_must_be_counts():
    y = np.r_[np.full(99, 3.0), 2.5]
    res = audit_forecasts(y, mean=np.full(100, 3.0), noise="poisson", settings=FAST, label="calls")
    assert (
        res.verdict == "error"
        and "non-negative integers" in res.production.message
        and "position 99" in res.production.message
    )


def test_short_series_is_insufficient():
    res = audit_forecasts(np.ones(30) + np.arange(30), mean=np.arange(30.0), scale=1.0, settings=FAST, label="new-site")
    assert res.verdict == "insufficient" and "longer than the series" in res.production.message


def test_forecasts_before_the_window_may_be_missing():
    y, mean, sd = _normal_case(5)
    mean = mean.copy()
    mean[:50] = np.nan  # no forecasts stored before the window: accepted
    assert audit_forecasts(y, mean=mean, scale=sd, settings=FAST).production.ok


def test_pit_functions_raise_input_errors():
    with pytest.raises(InputError, match="cross"):
        pit_quantiles([1.0], {0.1: [2.0], 0.9: [1.0]})
    with pytest.raises(InputError, match="positive"):
        pit_location_scale([1.0], [0.0], [-1.0])
    with pytest.raises(InputError, match="no uncertainty"):
        pit_quantiles([1.0], {0.1: [2.0], 0.9: [2.0]})


def test_forecast_timing():
    target = np.array(["2026-11-02", "2026-11-03", "2026-11-04", "2026-11-05"], dtype="datetime64[D]")
    issued = np.array(["2026-11-01", "2026-11-03", "NaT", "2026-11-06"], dtype="datetime64[D]")
    problems = check_forecast_timing(issued, target, label="supplier-7")
    assert len(problems) == 2
    assert "1 forecast(s) have no issue time" in problems[0] and "position 2" in problems[0]
    assert "2 forecast(s) were issued at or after" in problems[1] and "position 1" in problems[1]
    assert all(p.startswith("supplier-7: ") for p in problems)
    assert check_forecast_timing(target - 1, target) == []
    assert "one issue time per forecast" in check_forecast_timing(target[:2], target)[0]


# --------------------------------------------------------------------------------------------
# Seeded size and power
# --------------------------------------------------------------------------------------------
def test_size_under_correct_one_step_laws():
    """200 series with correct normal predictive laws: the whole check (p-value <= 0.05) rejects near 5 %."""
    cache = CalibrationCache()
    rejections = 0
    reps = 200
    for i in range(reps):
        y, mean, sd = _normal_case(1000 + i, n=120)
        settings = dataclasses.replace(
            FAST, seed=i % 10
        )  # spread over table seeds (Monte Carlo size is exact on average)
        res = audit_forecasts(y, mean=mean, scale=sd, settings=settings, cache=cache)
        assert res.production.ok
        rejections += res.production.p_value <= 0.05
    # common practice: binomial sd 0.015 at 200 series; wide tolerance [0.01, 0.10]
    assert 0.01 <= rejections / reps <= 0.10


def test_power_against_an_understated_scale_and_a_biased_mean():
    cache = CalibrationCache()
    reps = 60
    narrow = biased = 0
    for i in range(reps):
        y, mean, _ = _normal_case(2000 + i, n=120)
        narrow += audit_forecasts(y, mean=mean, scale=0.6, settings=FAST, cache=cache).production.p_value <= 0.05
        biased += audit_forecasts(y, mean=mean + 0.75, scale=1.0, settings=FAST, cache=cache).production.p_value <= 0.05
    # common practice: a stated standard deviation of 0.6 for a true 1, and a bias of 0.75 sd, are
    # gross errors that 56 observations should reveal in most series
    assert narrow / reps >= 0.6
    assert biased / reps >= 0.6
