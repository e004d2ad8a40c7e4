"""Change location: split statistic against scipy, location accuracy, permutation p-value."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from fitaudit.core.change import locate_change, split_statistics
from fitaudit.core.exceptions import InsufficientDataError


def test_split_statistic_is_the_g_test_of_homogeneity(rng):
    idx = rng.integers(0, 6, size=80)
    prof = split_statistics(idx, 6, 10)
    for k in (10, 33, 70):
        table = np.vstack([np.bincount(idx[:k], minlength=6), np.bincount(idx[k:], minlength=6)])
        keep = table.sum(axis=0) > 0
        # source: scipy.stats.chi2_contingency with lambda_="log-likelihood" (the G-test of homogeneity)
        g = stats.chi2_contingency(table[:, keep], correction=False, lambda_="log-likelihood").statistic
        assert prof[k - 10] == pytest.approx(g, rel=1e-10)


def test_level_shift_is_located():
    rng = np.random.default_rng(5)
    e = np.r_[rng.normal(0, 1, 150), rng.normal(1.2, 1, 100)]
    res = locate_change(e, permutations=199, seed=1)
    # common practice: a shift of 1.2 standard deviations over 100 points is found within a few points
    assert abs(res.index - 150) <= 12
    assert res.p_value <= 0.01
    assert res.before.sum() == pytest.approx(1.0) and res.after.sum() == pytest.approx(1.0)


def test_no_change_gives_roughly_uniform_p_values():
    rng = np.random.default_rng(8)
    p = [locate_change(rng.normal(size=120), permutations=99, seed=i).p_value for i in range(60)]
    # common practice: under exchangeability the permutation p-value is valid; 60 draws, wide band
    assert np.mean(np.array(p) <= 0.1) <= 0.25
    assert 0.3 <= np.mean(p) <= 0.7


def test_too_short_is_insufficient():
    with pytest.raises(InsufficientDataError, match="residuals are required"):
        locate_change(np.random.default_rng(0).normal(size=20))
