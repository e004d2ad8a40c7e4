"""Calibration: chi-square points, Monte Carlo p-values, null tables, Nikulin-Rao-Robson."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from fitaudit.core.calibration import (
    CalibrationCache,
    NullTable,
    chi2_critical_value,
    chi2_p_value,
    nrr_term,
    production_table,
    refit_table,
    standardised_maximum,
)
from fitaudit.core.cells import cell_counts, number_of_cells
from fitaudit.core.divergence import DEFAULT_ALPHAS, DEFAULT_BETAS, divergence_map
from fitaudit.core.noise import get_law

GRID = (DEFAULT_ALPHAS, DEFAULT_BETAS, "geometric", None)


@pytest.mark.parametrize(
    "df,value",
    [
        (1, 3.84146),  # source: Abramowitz & Stegun (1964) table 26.8, upper 5 % points
        # (table number from memory; docs/method.md §13.3)
        (2, 5.99146),  # source: Abramowitz & Stegun (1964) table 26.8
        (3, 7.81473),  # source: Abramowitz & Stegun (1964) table 26.8
        (4, 9.48773),  # source: Abramowitz & Stegun (1964) table 26.8
        (5, 11.0705),  # source: Abramowitz & Stegun (1964) table 26.8
        (10, 18.30704),  # source: Abramowitz & Stegun (1964) table 26.8
    ],
)
def test_chi_square_upper_five_percent_points(df, value):
    assert chi2_critical_value(0.05, df) == pytest.approx(value, abs=6e-5)


def test_chi_square_lower_tail_point():
    # source: NIST/SEMATECH e-Handbook 1.3.6.7.4, df 10, probability of exceeding 0.90 -> 4.865
    assert chi2_critical_value(0.90, 10) == pytest.approx(4.865, abs=5e-4)
    assert chi2_p_value(np.inf, 3) == 0.0
    assert chi2_p_value(4.865, 10) == pytest.approx(0.90, abs=1e-4)


def test_monte_carlo_p_value_and_critical_value_by_hand():
    # four simulated standardised maxima 1, 2, 3, 4 (R = 4): p(2.5) = (1 + 2) / 5
    # source: Davison & Hinkley (1997) eq. 4.11
    table = NullTable(("hand",), np.ones((1, 1)), np.array([1.0, 2.0, 3.0, 4.0]))
    assert table.p_value(2.5) == pytest.approx(3 / 5)
    assert table.p_value(4.0) == pytest.approx(2 / 5)
    assert table.p_value(10.0) == pytest.approx(1 / 5)
    r999 = NullTable(("hand",), np.ones((1, 1)), np.arange(1.0, 1000.0))
    c = r999.critical_value(0.05)
    # common practice: with R = 999 the 5 % test rejects when at most 49 replicates reach the statistic
    assert c == 950.0
    assert r999.p_value(c + 1e-9) <= 0.05 < r999.p_value(c)


def test_standardised_maximum_skips_infinite_points():
    stats_ = np.array([[[1.0, np.inf], [3.0, 2.0]], [[np.inf, np.inf], [np.inf, np.inf]]])
    ref = np.array([[2.0, 1.0], [1.5, np.inf]])
    out = standardised_maximum(stats_, ref)
    assert out[0] == pytest.approx(2.0) and out[1] == np.inf


def test_tables_are_shared_and_do_not_depend_on_build_order():
    a, b = CalibrationCache(), CalibrationCache()
    t1 = production_table(40, 8, *GRID, 99, 3, a)
    production_table(60, 10, *GRID, 99, 3, b)
    t2 = production_table(40, 8, *GRID, 99, 3, b)
    assert np.array_equal(t1.r_max, t2.r_max) and np.array_equal(t1.reference, t2.reference)
    assert production_table(40, 8, *GRID, 99, 3, a) is t1 and a.hits == 1 and a.builds == 1


def test_tables_can_be_iterated_while_a_table_is_added():
    # Prefect walks a task's parameters (the cache among them) in one thread while a batch in
    # another task thread adds a table: the walk must not see the dict change size
    cache = CalibrationCache()
    first = production_table(40, 8, *GRID, 99, 3, cache)
    seen = []
    for key in cache.tables:
        added = production_table(60, 10, *GRID, 99, 3, cache)  # a new key, built during the walk
        seen.append(key)
    assert seen == [first.key] and len(cache) == 2 and cache.builds == 2
    other = CalibrationCache()
    production_table(40, 8, *GRID, 99, 3, other)
    for _ in cache.tables.items():
        cache.merge(other)  # nothing new: the same two tables
        production_table(80, 12, *GRID, 99, 3, other)
        cache.merge(other)  # one new table, added during the walk
    assert len(cache) == 3 and cache.tables[added.key] is added


def test_production_null_size(rng):
    """Under the null (uniform PIT values) the simulated calibration rejects about 5 %."""
    n, s = 60, number_of_cells(60)
    cache = CalibrationCache()
    table = production_table(n, s, *GRID, 499, 11, cache)
    reps = 400
    counts = cell_counts(rng.random((reps, n)), s)
    r_obs = standardised_maximum(divergence_map(counts, np.full(s, 1 / s)).statistic, table.reference)
    p = np.array([table.p_value(v) for v in r_obs])
    rate = np.mean(p <= 0.05)
    # common practice: 400 replicates give a Monte Carlo standard error of about 0.011 at 5 %
    assert 0.02 <= rate <= 0.085


def test_refit_table_is_pivotal_for_location_scale(rng):
    """Residuals from normal(5, 3) with location and scale re-estimated have ~uniform p-values.

    The size of a Monte Carlo test is exact only on average over tables, so ten tables (seeds)
    each judge 60 data sets.
    """
    law = get_law("normal")
    n = 150
    s = number_of_cells(n, 2)
    p = []
    for seed in range(10):
        table = refit_table(law, n, s, True, *GRID, 199, seed)
        x = rng.normal(5.0, 3.0, (60, n))
        loc, scale, _ = law.fit_batch(x, location=True)
        counts = cell_counts(law.cdf_batch(x, loc, scale, None), s)
        r_obs = standardised_maximum(divergence_map(counts, np.full(s, 1 / s)).statistic, table.reference)
        p.extend(table.p_value(v) for v in r_obs)
    rates = [np.mean(np.array(p) <= a) for a in (0.05, 0.10, 0.25)]
    # common practice: 600 p-values, binomial bounds at about 3 standard errors around 0.05 / 0.10 / 0.25
    assert 0.022 <= rates[0] <= 0.085
    assert 0.065 <= rates[1] <= 0.14
    assert 0.20 <= rates[2] <= 0.30


def _normal_equiprobable_gradient(s: int, sigma: float) -> np.ndarray:
    """dq_j/dmu and dq_j/dsigma for cells equiprobable under N(0, sigma^2), boundaries fixed (by hand)."""
    z = stats.norm.ppf(np.linspace(0, 1, s + 1))
    phi = stats.norm.pdf(z)
    with np.errstate(invalid="ignore"):
        zphi = np.where(np.isfinite(z), z * phi, 0.0)
    d_mu = -(phi[1:] - phi[:-1]) / sigma
    d_sigma = -(zphi[1:] - zphi[:-1]) / sigma
    return np.column_stack([d_mu, d_sigma])


def test_nrr_term_hand_worked_case():
    """Y^2 - X^2 = V'B (J - J*)^-1 B'V for normal (mu, sigma), s = 4, computed by hand with scipy."""
    counts = np.array([30.0, 20.0, 22.0, 28.0])
    sigma = 2.0
    s, n = 4, counts.sum()
    grad = _normal_equiprobable_gradient(s, sigma)
    info = (
        np.diag([1.0, 2.0]) / sigma**2
    )  # source: per-observation Fisher information of N(mu, sigma^2) (docs/method.md §5.3)
    v = (counts - n / s) / np.sqrt(n / s)
    b = grad * np.sqrt(s)
    by_hand = v @ b @ np.linalg.inv(info - b.T @ b) @ b.T @ v
    assert nrr_term(counts, info, grad) == pytest.approx(by_hand, rel=1e-12)
    # the noise module's analytic gradient and information give the same term
    law = get_law("normal")
    params = law.from_variance(sigma**2)
    fitted = type(params)(law="normal", loc=0.0, scale=sigma, shape=None, estimated=("loc", "scale"))
    assert nrr_term(counts, law.fisher_information(fitted), law.cell_probability_gradient(s, fitted)) == pytest.approx(
        by_hand, rel=1e-9
    )
    del params


def test_nrr_restores_chi_square_size(rng):
    """Nikulin (1973), Rao and Robson (1974): ML (mu, sigma) from iid normal data, n = 500, s = 10: X2 + NRR is
    near its chi2(9) level, X2 alone is conservative (Chernoff and Lehmann 1954; docs/method.md §5.3, §5.4)."""
    law = get_law("normal")
    n, s, reps = 500, 10, 400
    x = rng.standard_normal((reps, n))
    loc, scale, _ = law.fit_batch(x, location=True)
    u = law.cdf_batch(x, loc, scale, None)
    counts = cell_counts(u, s)
    x2 = divergence_map(counts, np.full(s, 1 / s), [2.0], [0.0]).statistic[:, 0, 0]
    y2 = []
    for i in range(reps):
        p = type(law.fit(x[i]))(law="normal", loc=loc[i], scale=scale[i], shape=None, estimated=("loc", "scale"))
        y2.append(x2[i] + nrr_term(counts[i], law.fisher_information(p), law.cell_probability_gradient(s, p)))
    crit = stats.chi2.isf(0.05, s - 1)
    rate_y2 = np.mean(np.array(y2) > crit)
    rate_x2 = np.mean(x2 > crit)
    # source: Nikulin (1973), Rao and Robson (1974): the corrected statistic tends to chi2(s - 1); X2 alone lies
    # between chi2(s - 3) and chi2(s - 1) (Chernoff and Lehmann 1954), so it rejects less (docs/method.md §5.3, §5.4)
    assert 0.02 <= rate_y2 <= 0.09
    assert rate_x2 < rate_y2


def test_estimated_t_shapes_in_one_grid_cell_share_a_table():
    """An estimated degrees of freedom is simulated on the grid uniform in 1/nu (docs/method.md §7.3):
    5.5 and 5.7 (1/nu 0.182 and 0.175) fall in the cell of 1/nu = 0.18, 8.0 does not."""
    law = get_law("student-t")
    cache = CalibrationCache()
    tables = [refit_table(law, 80, 8, True, *GRID, 99, 3, shape=nu, cache=cache) for nu in (5.5, 5.7, 8.0)]
    assert cache.builds == 2 and tables[0] is tables[1] and tables[2] is not tables[0]
    assert "shape=5.555555555555555" in tables[0].key  # 1 / (9 * 0.02)
    # a fixed shape is simulated as given
    fixed = refit_table(get_law("student-t", 5.7), 80, 8, True, *GRID, 99, 3, shape=5.7, cache=cache)
    assert "shape=5.7" in fixed.key


def test_refit_table_blocks_give_the_table_of_one_pass(monkeypatch):
    """Fitting the simulated rows in blocks (to bound the memory) changes no value of the table."""
    from fitaudit.core import calibration

    law = get_law("student-t")
    tables = []
    for rows in (10**9, 37):
        monkeypatch.setattr(calibration, "_FIT_BLOCK_ROWS", rows)
        tables.append(refit_table(law, 60, 8, True, *GRID, 99, 5, shape=9.0))
    whole, blocks = tables
    assert whole.key == blocks.key
    np.testing.assert_array_equal(whole.r_max, blocks.r_max)
    np.testing.assert_array_equal(whole.reference, blocks.reference)


def _pit_refit_table(law, n, s, gate, replicates, seed, shape):
    """The refit table built from the PIT values of every simulated value (the construction the
    counts below the fitted quantiles replaced): same key, same draws, same fits."""
    from fitaudit.core import calibration

    probe = refit_table(law, n, s, True, *GRID, 3, seed, shape=shape, gate=gate)  # only for its key
    key = tuple(f"R={replicates}" if str(k).startswith("R=") else k for k in probe.key)
    x = law.sample_standard((2 * replicates, n), calibration.key_rng(seed, *key), shape=shape)
    u = law.cdf_batch(x, *law.fit_batch(x, location=True))
    maps = calibration._map_statistics(cell_counts(u, s), s, *GRID)
    return calibration._with_gate(key, maps, replicates, gate, u)


@pytest.mark.parametrize("name, shape", [("normal", None), ("student-t", 6.25), ("laplace", None), ("logistic", None)])
def test_refit_tables_from_counts_below_the_fitted_quantiles_equal_those_from_the_pit(name, shape):
    """The simulated refit table counts each row's values below its fitted law's quantiles at the
    cells' boundaries instead of computing every PIT value; the tables (members and gate) are the same."""
    from fitaudit.core.calibration import Gate
    from fitaudit.core.cells import make_partitions
    from fitaudit.core.settings import DEFAULT_GATE_MEMBERS, DEFAULT_PARTITIONS

    law, n, s = get_law(name), 150, number_of_cells(150, 2)
    alphas, betas = zip(*DEFAULT_GATE_MEMBERS)
    gate = Gate(make_partitions(DEFAULT_PARTITIONS, n, 2), alphas, betas)
    table = refit_table(law, n, s, True, *GRID, 199, 11, shape=shape, gate=gate)
    reference = _pit_refit_table(law, n, s, gate, 199, 11, shape)
    assert table.key == reference.key
    for field in ("reference", "r_max", "gate_reference", "gate_max"):
        np.testing.assert_array_equal(getattr(table, field), getattr(reference, field))


def test_table_jobs_built_apart_and_merged_in_order_equal_prepare_calibration():
    """The run's tables built one per cache (as the worker processes do) and merged in the order of
    ``table_jobs`` are the tables of ``prepare_calibration``, in the same order."""
    from fitaudit.core.calibration import build_tables, prepare_calibration, table_jobs
    from fitaudit.core.settings import AuditSettings

    settings = AuditSettings(replicates=99, audit_window=40)
    arima = {"family": "arima", "order": [1, 0, 1], "seasonal": [0, 1, 1, 7]}
    entries = [
        (arima, "normal", settings, 120, True),
        ({"family": "arima", "order": [1, 0, 0]}, "logistic", settings, 120, False),
        (arima, "normal", settings, 120, True),  # the same tables again
        ({"family": "arima", "order": [2, 0, 0]}, {"law": "student-t", "shape": None}, settings, 120, True),
        ({"family": "arima", "order": [-1, 0, 0]}, "normal", settings, 120, True),  # not a model: skipped
    ]
    jobs = table_jobs(entries)
    # production (window 40); refit normal (113 errors after the seasonal difference), refit
    # logistic (120, location estimated); the t law's estimated shape has no table before the audit
    assert [(j[0], j[2]) for j in jobs] == [("production", 40), ("refit", 113), ("refit", 120)]
    whole = prepare_calibration(entries)
    merged = CalibrationCache()
    for job in jobs:
        merged.merge(build_tables([job], CalibrationCache()))
    assert list(merged.tables) == list(whole.tables)
    for key, table in whole.tables.items():
        other = merged.tables[key]
        for name in ("reference", "r_max", "gate_reference", "gate_max"):
            assert np.array_equal(getattr(other, name), getattr(table, name)), (key[0], name)
