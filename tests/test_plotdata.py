"""The report's chart data of one check (core/plotdata.py ``plot_data``) against numpy, scipy and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from statsmodels.tsa.stattools import acf as sm_acf

from fitaudit.core.noise import NoiseParams, get_law
from fitaudit.core.plotdata import plot_data


@pytest.mark.parametrize("n", [7, 80, 81, 723])
def test_chart_data_match_the_reference_libraries(n):
    rng = np.random.default_rng(n)
    e = 0.4 + 1.7 * rng.standard_t(5, n)
    law, params = get_law("student-t"), NoiseParams("student-t", 0.4, 1.7, 5.0)
    out = plot_data(e, law, params, lags=5)
    z = (e - 0.4) / 1.7
    k = min(n, 80)
    probs = (np.arange(1, k + 1) - 0.5) / k
    # source: numpy's quantile (default linear rule) and histogram, as the reference for the Q-Q and bar charts
    np.testing.assert_allclose(out["qq_sample"], np.quantile(z, probs).round(6), atol=1.5e-6)
    counts, _ = np.histogram(np.clip(z, -5.0, 5.0 - 1e-9), bins=np.linspace(-5.0, 5.0, 26))
    assert out["hist_counts"] == counts.tolist()
    # source: scipy.stats.t quantiles of the assumed law
    np.testing.assert_allclose(out["qq_theoretical"], stats.t.ppf(probs, 5.0).round(6), atol=1.5e-6)
    # source: statsmodels acf (adjusted=False, fft=False), the estimator core/diagnostics.acf documents
    np.testing.assert_allclose(out["acf"], sm_acf(e, nlags=5, adjusted=False, fft=False)[1:].round(6), atol=1.5e-6)
    # common practice: the band +-z_0.975 / sqrt(n) (z_0.975 = 1.96 to two decimals; source: scipy's normal quantile)
    assert out["acf_band"] == pytest.approx(stats.norm.ppf(0.975) / np.sqrt(n))
