"""Fast, seeded versions of the validation study (bench/calibration.py, docs/validation.md).

Size: under correctly specified models the simulated calibration rejects about 5 % of series in
the distribution gate, for the refit and the production check.  The size of a Monte Carlo test is
exact on average over tables, so the series are spread over ten table seeds.  Tolerances are
about 3.5 standard errors of a binomial rate plus the spread between tables.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from scipy import stats

from fitaudit.core.audit import AuditSettings, audit_series
from fitaudit.core.calibration import CalibrationCache, refit_table
from fitaudit.core.models import Arima
from fitaudit.core.noise import get_law

pytestmark = pytest.mark.slow

NOMINAL = 0.05  # common practice: the nominal 5 % level of the gates (docs/method.md §10.1)
TABLE_SEEDS = 10
SETTINGS = AuditSettings(replicates=199, locate_change=False)
AR1 = Arima(order=(1, 0, 0), trend="c")
AR1_TRUTH = {"ar1": 0.6, "intercept": 10.0, "sigma2": 1.0}


def _gate_rates(spec, truth, n, reps, noise="normal", draw=None, seed=0):
    """Distribution-gate rejection rates (refit, production) over ``reps`` simulated series."""
    rng = np.random.default_rng(seed)
    cache = CalibrationCache()
    refit = production = 0
    for i in range(reps):
        shocks = None if draw is None else draw(rng, n)
        y = spec.simulate(truth, n, rng, innovations=shocks)
        settings = dataclasses.replace(SETTINGS, seed=i % TABLE_SEEDS)
        res = audit_series(y, spec, noise=noise, production=truth, settings=settings, cache=cache)
        assert res.refit.ok and res.production.ok, res.reasons
        refit += res.refit.p_distribution <= NOMINAL
        production += res.production.p_distribution <= NOMINAL
    return refit / reps, production / reps


def test_size_arma_with_student_t_noise_of_fixed_shape():
    """ARMA(1,1), student-t(5) innovations audited with the t law at shape 5, n = 500."""
    df = 5.0

    def draw(rng, n):
        return np.sqrt((df - 2) / df) * rng.standard_t(df, n)  # variance 1 = sigma2

    spec = Arima(order=(1, 0, 1), trend="c")
    truth = {"ar1": 0.5, "ma1": 0.3, "intercept": 2.0, "sigma2": 1.0}
    refit, production = _gate_rates(spec, truth, 500, 300, noise={"law": "student-t", "shape": df}, draw=draw, seed=41)
    # common practice: 300 series, binomial sd 0.0126 plus table spread ~0.005 -> about 3.5 sd either side
    assert 0.005 <= refit <= 0.095
    assert 0.005 <= production <= 0.095


def test_size_airline_model():
    """Airline ARIMA(0,1,1)(0,1,1)12 without intercept (zero-mean noise law), n = 144."""
    spec = Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12))
    truth = {"ma1": -0.4, "sma1": -0.6, "sigma2": 1.0}
    refit, production = _gate_rates(spec, truth, 144, 300, seed=42)
    # common practice: as above, about 3.5 binomial sd around the nominal 5 %
    assert 0.005 <= refit <= 0.095
    assert 0.005 <= production <= 0.095


def test_single_members_at_their_own_reference_have_nominal_size():
    """The power study's baselines: Pearson (alpha 2, beta 0) and G2 (alpha 1, beta 0), each
    against its own simulated 95 % point, reject about 5 % of correctly specified AR(1) fits."""
    rng = np.random.default_rng(43)
    cache = CalibrationCache()
    law = get_law("normal")
    ia2, ia1, ib = SETTINGS.alphas.index(2.0), SETTINGS.alphas.index(1.0), SETTINGS.betas.index(0.0)
    pearson = likelihood_ratio = 0
    reps = 300
    for i in range(reps):
        settings = dataclasses.replace(SETTINGS, seed=i % TABLE_SEEDS)
        check = audit_series(AR1.simulate(AR1_TRUTH, 200, rng), AR1, settings=settings, cache=cache).refit
        table = refit_table(
            law,
            check.n,
            check.cells,
            True,
            settings.alphas,
            settings.betas,
            settings.scaling,
            settings.r,
            settings.replicates,
            settings.seed,
            cache=cache,
        )
        t = check.map.statistic
        # source: scipy.stats.chisquare is Pearson's X2 (lambda = 1 of Cressie-Read)
        assert t[ia2, ib] == pytest.approx(stats.chisquare(check.counts).statistic, rel=1e-9)
        pearson += t[ia2, ib] > table.reference[ia2, ib]
        likelihood_ratio += t[ia1, ib] > table.reference[ia1, ib]
    # common practice: 300 series, about 3.5 binomial sd around the nominal 5 %
    assert 0.005 <= pearson / reps <= 0.095
    assert 0.005 <= likelihood_ratio / reps <= 0.095


def test_heavy_tails_and_neglected_seasonality_are_detected():
    """Power well above the nominal level: student-t(3) noise audited as normal (distribution
    gate) and a neglected SAR(1)_7 term (whole check through the Ljung-Box gate), n = 200."""
    rng = np.random.default_rng(44)
    cache = CalibrationCache()
    reps = 150
    sar = Arima(order=(1, 0, 0), seasonal=(1, 0, 0, 7), trend="c")
    sar_truth = {"ar1": 0.6, "sar1": 0.3, "intercept": 10.0, "sigma2": 1.0}
    heavy = seasonal = 0
    for i in range(reps):
        settings = dataclasses.replace(SETTINGS, seed=i % TABLE_SEEDS)
        y = AR1.simulate(AR1_TRUTH, 200, rng, innovations=rng.standard_t(3.0, 200) / np.sqrt(3.0))
        heavy += audit_series(y, AR1, settings=settings, cache=cache).refit.p_distribution <= NOMINAL
        y = sar.simulate(sar_truth, 200, rng)
        seasonal += audit_series(y, AR1, settings=settings, cache=cache).refit.p_value <= NOMINAL
    # common practice: a rate of 0.05 + 4 binomial sd (0.018 at 150 series) rules out a blind test
    assert heavy / reps >= 0.125
    assert seasonal / reps >= 0.125
