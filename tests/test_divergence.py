"""The divergence engine against outside references (scipy, mpmath, published examples)."""

from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats

from fitaudit.core.divergence import (
    CLASSICAL_MEMBERS,
    DEFAULT_ALPHAS,
    DEFAULT_BETAS,
    divergence_map,
    empty_cell_factor,
    partition_statistics,
    power_generator,
    scaled_bregman,
    zero_model_cell_factor,
)
from fitaudit.core.exceptions import InputError

COUNT_VECTORS = [
    np.array([315, 108, 101, 32.0]),  # source: Mendel (1866) dihybrid cross (docs/method.md §13.1)
    np.array([16, 18, 16, 14, 12, 12.0]),  # source: scipy.stats.chisquare docstring example
    np.array([22, 38, 20, 11.0]),  # source: Yates/Moore/Starnes ex. 14.3 (docs/method.md §13.1)
    np.array([3, 9, 1, 7, 5, 2, 8, 4.0]),  # arbitrary small counts, checked against scipy below
]
PROBS = [
    np.array([9, 3, 3, 1.0]) / 16,
    np.full(6, 1 / 6),
    np.array([0.32, 0.41, 0.20, 0.07]),
    np.array([1, 2, 1, 2, 1, 2, 1, 2.0]) / 12,
]


def two_n_b(counts, probs, alpha, beta=0.0, scaling="geometric", r=None):
    n = counts.sum()
    return 2 * n * scaled_bregman(counts / n, probs, alpha, beta, scaling, r)


def pd(counts, probs, lam):
    """scipy's Cressie-Read power-divergence statistic (the outside reference)."""
    return stats.power_divergence(counts, counts.sum() * probs, lambda_=lam).statistic


# --------------------------------------------------------------------------------------------
# m = q: the Cressie-Read family (docs/method.md §3.1)
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("alpha", [-1.0, -0.5, 0.0, 0.5, 1.0, 5 / 3, 2.0, 3.0])
@pytest.mark.parametrize("k", range(len(COUNT_VECTORS)))
def test_model_scaling_equals_scipy_power_divergence(alpha, k):
    counts, probs = COUNT_VECTORS[k], PROBS[k]
    ours = two_n_b(counts, probs, alpha, scaling="model")
    # source: scipy.stats.power_divergence with lambda_ = alpha - 1 (Cressie and Read 1984; docs/method.md §3.1)
    assert ours == pytest.approx(pd(counts, probs, alpha - 1), rel=1e-12, abs=1e-12)


@pytest.mark.parametrize("alpha", [-1.0, -0.5, 0.0, 0.5, 1.0, 5 / 3, 2.0, 3.0])
def test_map_beta_zero_column_equals_scipy(alpha):
    counts = np.array([COUNT_VECTORS[0], COUNT_VECTORS[2]])
    probs = np.array([PROBS[0], PROBS[2]])
    m = divergence_map(counts, probs, [alpha], DEFAULT_BETAS)
    for i in range(2):
        # source: scipy.stats.power_divergence, lambda_ = alpha - 1 (geometric beta = 0 is m = q)
        assert m.statistic[i, 0, 0] == pytest.approx(pd(counts[i], probs[i], alpha - 1), rel=1e-12)


# --------------------------------------------------------------------------------------------
# m = p and geometric scaling as Cressie-Read combinations (docs/method.md §3.2, §3.3)
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("alpha", [-1.0, -0.5, 0.25, 0.5, 1.5, 2.0, 2.75])
@pytest.mark.parametrize("k", range(len(COUNT_VECTORS)))
def test_data_scaling_is_cressie_read_combination(alpha, k):
    counts, probs = COUNT_VECTORS[k], PROBS[k]
    # source: docs/method.md §3.2: 2nB(P,Q|P) = (alpha-1) PD(lambda=-alpha) + (2-alpha) PD(lambda=1-alpha)
    ref = (alpha - 1) * pd(counts, probs, -alpha) + (2 - alpha) * pd(counts, probs, 1 - alpha)
    assert two_n_b(counts, probs, alpha, scaling="data") == pytest.approx(ref, rel=1e-10)


@pytest.mark.parametrize("alpha", [-1.0, -0.5, 0.5, 1.5, 2.0, 3.0])
@pytest.mark.parametrize("beta", [0.25, 0.5, 0.875])
@pytest.mark.parametrize("k", range(len(COUNT_VECTORS)))
def test_geometric_scaling_is_three_term_cressie_read(alpha, beta, k):
    counts, probs = COUNT_VECTORS[k], PROBS[k]
    c = beta * (1 - alpha)
    w1 = (alpha + c) * (alpha + c - 1) / (alpha * (alpha - 1))
    w2 = c * (c - 1) / alpha
    w3 = -c * (1 + c) / (alpha - 1)
    assert w1 + w2 + w3 == pytest.approx(1.0)  # source: docs/method.md §3.3
    # CR_gamma corresponds to power_divergence with lambda = gamma - 1
    ref = w1 * pd(counts, probs, alpha + c - 1) + w2 * pd(counts, probs, c - 1) + w3 * pd(counts, probs, c)
    assert two_n_b(counts, probs, alpha, beta) == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize(
    "scaling,beta,r",
    [
        ("geometric", 0.3, None),
        ("power", 0.6, 1.0),
        ("power", 0.4, -2.0),
        ("data", 0.0, None),
        ("model", 0.0, None),
        ("unit", 0.0, None),
        ("power", 0.5, 0.5),
    ],
)
def test_alpha_one_is_kullback_leibler_for_every_scaling(scaling, beta, r):
    p, q = np.array([0.1, 0.2, 0.3, 0.4]), np.array([0.25, 0.25, 0.25, 0.25])
    # source: docs/method.md §2.3: m^0 = 1, so B_1 = KL(P||Q) = scipy.stats.entropy(p, q)
    assert scaled_bregman(p, q, 1.0, beta, scaling, r) == pytest.approx(stats.entropy(p, q), rel=1e-13)


@pytest.mark.parametrize(
    "scaling,beta,r",
    [
        ("geometric", 0.3, None),
        ("power", 0.6, 1.0),
        ("power", 0.4, -2.0),
        ("data", 0.0, None),
        ("model", 0.0, None),
        ("unit", 0.0, None),
    ],
)
def test_alpha_two_is_half_chi_square_over_m(scaling, beta, r):
    p, q = np.array([0.1, 0.2, 0.3, 0.4]), np.array([0.3, 0.1, 0.2, 0.4])
    m = {
        "geometric": p**beta * q ** (1 - beta),
        "power": (beta * p ** (r or 1) + (1 - beta) * q ** (r or 1)) ** (1 / (r or 1)),
        "data": p,
        "model": q,
        "unit": np.ones(4),
    }[scaling]
    # source: docs/method.md §2.3: b_2(p, q, m) = (p - q)^2 / (2 m) for every m
    assert scaled_bregman(p, q, 2.0, beta, scaling, r) == pytest.approx(0.5 * np.sum((p - q) ** 2 / m), rel=1e-12)


# --------------------------------------------------------------------------------------------
# Density power divergence and Lindsay's blended weights (docs/method.md §3.4, §3.5)
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("a", [0.1, 0.5, 1.0, 2.0])
def test_density_power_divergence_identity(a):
    g = np.array([0.15, 0.25, 0.35, 0.25])
    f = np.array([0.2, 0.3, 0.3, 0.2])
    # source: Basu, Harris, Hjort & Jones (1998) DPD; identity d_a = (1+a) B_{1+a}(G,F|1), docs/method.md §3.5
    dpd = np.sum(f ** (1 + a) - (1 + 1 / a) * g * f**a + (1 / a) * g ** (1 + a))
    assert (1 + a) * scaled_bregman(g, f, 1 + a, scaling="unit") == pytest.approx(dpd, rel=1e-12)


@pytest.mark.parametrize("beta", [0.0, 0.25, 0.5, 0.9])
def test_blended_weight_chi_square(beta):
    p = np.array([0.05, 0.2, 0.3, 0.45])
    q = np.array([0.25, 0.25, 0.25, 0.25])
    # source: Lindsay (1994) blended weight chi-square, 1/2 sum (p-q)^2/(beta p + (1-beta) q)
    # (docs/method.md §3.4; the factor 1/2 relative to Lindsay's normalisation is from memory)
    bwcs = 0.5 * np.sum((p - q) ** 2 / (beta * p + (1 - beta) * q))
    assert scaled_bregman(p, q, 2.0, beta, "power", r=1.0) == pytest.approx(bwcs, rel=1e-12)
    # source: Lindsay / Basu-Lindsay blended weight Hellinger distance, r = 1/2
    # (docs/method.md §3.4; normalisation from memory)
    bwhd = 0.5 * np.sum((p - q) ** 2 / (beta * np.sqrt(p) + (1 - beta) * np.sqrt(q)) ** 2)
    assert scaled_bregman(p, q, 2.0, beta, "power", r=0.5) == pytest.approx(bwhd, rel=1e-12)


def test_triangular_discrimination():
    p, q = np.array([0.1, 0.6, 0.3]), np.array([0.3, 0.3, 0.4])
    # source: docs/method.md §3.4: alpha = 2, arithmetic beta = 1/2 gives sum (p-q)^2/(p+q)
    assert scaled_bregman(p, q, 2.0, 0.5, "power", r=1.0) == pytest.approx(np.sum((p - q) ** 2 / (p + q)))


# --------------------------------------------------------------------------------------------
# Empty cells and impossible cells (docs/method.md §4)
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "alpha,beta,scaling,r,expected",
    [
        (-0.5, 0.25, "geometric", None, math.inf),  # source: docs/method.md §4.1 (examples)
        (-0.5, 1 / 3, "geometric", None, 4 / 3),  # source: docs/method.md §4.1 (1.333)
        (-0.5, 0.5, "geometric", None, 0.0),  # source: docs/method.md §4.1
        (2.0, 0.0, "power", 1.0, 0.5),  # source: docs/method.md §4.1 (alpha = 2 arithmetic)
        (2.0, 0.25, "power", 1.0, 2 / 3),  # source: docs/method.md §4.1 (0.667)
        (2.0, 0.5, "power", 1.0, 1.0),  # source: docs/method.md §4.1
        (2.0, 1.0, "power", 1.0, math.inf),  # source: docs/method.md §4.1
        (0.5, 0.0, "model", None, 2.0),  # source: docs/method.md §4.1 table, m = q: 1/alpha
        (0.0, 0.0, "model", None, math.inf),  # source: docs/method.md §4.1 table, m = q, alpha = 0
        (-1.0, 0.0, "model", None, math.inf),  # source: docs/method.md §4.1 table, m = q, alpha < 0
        (1.0, 0.7, "geometric", None, 1.0),  # source: docs/method.md §4.1 table, alpha = 1
        (2.0, 0.5, "geometric", None, math.inf),  # source: docs/method.md §4.1 table, geometric alpha > 1
        (0.5, 0.5, "geometric", None, 0.0),  # source: docs/method.md §4.1 table, geometric 0 < alpha < 1
        (0.0, 0.5, "geometric", None, 0.0),  # source: docs/method.md §4.1 table, geometric alpha = 0
        (1.5, 0.0, "data", None, math.inf),  # source: docs/method.md §4.1 table, m = p alpha > 1
        (-2.0, 1.0, "data", None, 0.0),  # source: docs/method.md §4.1 table, m = p alpha < 0
        (0.5, 0.4, "power", -1.0, 0.0),  # source: docs/method.md §4.1 table, r < 0, beta > 0 behaves as m = p
        (0.0, 0.3, "power", 2.0, math.inf),  # source: docs/method.md §4.1 table, arithmetic-type alpha = 0
    ],
)
def test_empty_cell_factor_table(alpha, beta, scaling, r, expected):
    assert empty_cell_factor(alpha, beta, scaling, r) == pytest.approx(expected)


@pytest.mark.parametrize(
    "alpha,beta,scaling,r",
    [
        (0.5, 0.0, "model", None),
        (0.5, 0.3, "power", 1.0),
        (1.0, 0.0, "model", None),
        (2.0, 0.5, "power", 1.0),
        (-0.5, 0.5, "geometric", None),
        (0.25, 0.3, "power", -1.0),
    ],
)
def test_empty_cell_limit_matches_high_precision_limit(alpha, beta, scaling, r):
    """The analytic f0 agrees with mpmath evaluated at p = 1e-60 (finite cases converge fast)."""
    mpmath.mp.dps = 80
    a, b = mpmath.mpf(alpha), mpmath.mpf(beta)
    x = mpmath.mpf("1e-60")
    if a == 1:
        phi = x * mpmath.log(x) - x + 1
    else:
        phi = (x**a - 1 - a * (x - 1)) / (a * (a - 1))
    if scaling == "model":
        w = 1
    elif scaling == "geometric":
        w = x**b
    else:
        w = (b * x**r + 1 - b) ** (1 / mpmath.mpf(r))
    ref = float(w ** (1 - a) * phi)  # source: mpmath, 80 digits, definition of f0 (docs/method.md §4.1)
    assert float(empty_cell_factor(alpha, beta, scaling, r)) == pytest.approx(ref, rel=1e-6, abs=1e-12)


@pytest.mark.parametrize(
    "alpha,beta,scaling,r,expected",
    [
        (0.5, 0.0, "model", None, 2.0),  # source: docs/method.md §4.2: m = q, alpha < 1: 1/(1-alpha)
        (2.0, 0.0, "model", None, math.inf),  # source: docs/method.md §4.2
        (2.0, 1.0, "data", None, 0.5),  # source: docs/method.md §4.2: m = p, alpha > 1: 1/(alpha(alpha-1))
        (0.5, 0.5, "geometric", None, math.inf),  # source: docs/method.md §4.2: always inf for geometric 0<beta<1
        (3.0, 0.5, "power", 1.0, 0.5**-2 / 6),  # source: docs/method.md §4.2: c = beta, c^(1-alpha)/(alpha(alpha-1))
        (1.0, 0.5, "power", 1.0, math.inf),  # source: docs/method.md §4.2: alpha = 1 always inf
    ],
)
def test_zero_model_cell_factor(alpha, beta, scaling, r, expected):
    assert zero_model_cell_factor(alpha, beta, scaling, r) == pytest.approx(expected)


def test_empty_cells_give_finite_or_inf_never_nan():
    counts = np.array([[0, 5, 7, 8], [3, 0, 0, 17]], dtype=float)
    for scaling, r in [
        ("geometric", None),
        ("power", 1.0),
        ("power", -1.0),
        ("power", 0.5),
        ("model", None),
        ("data", None),
        ("unit", None),
    ]:
        m = divergence_map(counts, np.full(4, 0.25), DEFAULT_ALPHAS, DEFAULT_BETAS, scaling, r)
        assert not np.isnan(m.statistic).any(), scaling
        assert (m.statistic >= 0).all()
        assert np.array_equal(m.infinite, np.isinf(m.statistic))


def test_impossible_cell_is_infinite_and_flagged():
    m = divergence_map([4, 6, 1], [0.5, 0.5, 0.0], [1.0, 2.0], [0.0, 0.5])
    # source: docs/method.md §4.2: q = 0 < p is infinite at alpha = 1 and for geometric 0 < beta < 1
    assert np.isinf(m.statistic[0]).all() and m.infinite[1, 1]
    assert m.statistic[1, 0] == pytest.approx(math.inf)
    # alpha = 0.5 with m = q is finite: contribution p / (1 - alpha)
    m2 = divergence_map([4, 6, 1], [0.5, 0.5, 0.0], [0.5], [0.0])
    p = np.array([4, 6, 1]) / 11
    q = np.array([0.5, 0.5, 0.0])
    regular = np.sum([(pp**0.5 * qq**0.5 - 0.5 * qq - 0.5 * pp) / (0.5 * -0.5) for pp, qq in zip(p[:2], q[:2])])
    # source: docs/method.md §3.1 (b = [p^a q^(1-a) + (a-1) q - a p]/(a(a-1))) plus §4.2 (p/(1-alpha))
    assert m2.statistic[0, 0] == pytest.approx(2 * 11 * (regular + p[2] / 0.5), rel=1e-12)


# --------------------------------------------------------------------------------------------
# Published worked examples (docs/method.md §13)
# --------------------------------------------------------------------------------------------
SBD_POINTS = [(2, 0, 0), (1, 0, 0), (0.5, 0, 0), (0, 0, 0), (2, 0.5, 1), (0, 0.5, 0), (-0.5, 0.5, 0)]


@pytest.mark.parametrize(
    "counts,probs,expected",
    [
        # source: Mendel (1866) counts 315/108/101/32 vs 9:3:3:1; scipy.stats.power_divergence (docs/method.md §13.2)
        (
            [315, 108, 101, 32],
            [9 / 16, 3 / 16, 3 / 16, 1 / 16],
            [0.470024, 0.475445, 0.478266, 0.481162, 0.478153, 0.472661, 0.471324],
        ),
        # source: Yates/Moore/Starnes ex. 14.3 (grades vs .32/.41/.20/.07, X2 = 5.297);
        # scipy.stats.power_divergence (docs/method.md §13.2)
        (
            [22, 38, 20, 11],
            [0.32, 0.41, 0.20, 0.07],
            [5.296952, 4.846776, 4.689174, 4.569381, 4.633893, 5.026720, 5.149734],
        ),
    ],
)
def test_published_fixtures_scaled_members(counts, probs, expected):
    counts = np.asarray(counts, float)
    for (a, b, r), value in zip(SBD_POINTS, expected):
        scaling, rr = ("power", 1.0) if r == 1 else ("geometric", None)
        assert two_n_b(counts, np.asarray(probs), a, b, scaling, rr) == pytest.approx(value, abs=5e-7)


def test_mendel_classical_members_and_p_value():
    m = divergence_map([315, 108, 101, 32], [9 / 16, 3 / 16, 3 / 16, 1 / 16])
    # source: Mendel (1866) counts; X2 and its p-value by scipy.stats.chisquare, G2 and Cressie-Read 2/3
    # by scipy.stats.power_divergence (lambda_ = 0, 2/3) (docs/method.md §13.1)
    assert m.members["pearson"] == pytest.approx(0.470024, abs=5e-7)
    assert m.members["likelihood-ratio"] == pytest.approx(0.475445, abs=5e-7)
    assert m.members["cressie-read-2/3"] == pytest.approx(0.471799, abs=5e-7)
    assert stats.chi2.sf(m.members["pearson"], 3) == pytest.approx(0.925426, abs=5e-7)


def test_mendel_against_equal_ratios():
    m = divergence_map([315, 108, 101, 32], [0.25] * 4)
    # source: scipy.stats.chisquare on Mendel's (1866) counts against equal ratios (docs/method.md §13.1)
    assert m.members["pearson"] == pytest.approx(322.517986, abs=1e-6)


@pytest.mark.parametrize(
    "f_obs,f_exp,x2,p_x2,g2,p_g2",
    [
        # source: scipy.stats.chisquare / power_divergence docstrings
        ([16, 18, 16, 14, 12, 12], None, 2.0, 0.84914503608460956, 2.006573162632538, 0.84823476779463769),
        (
            [16, 18, 16, 14, 12, 12],
            [16, 16, 16, 16, 16, 8],
            3.5,
            0.62338762774958223,
            3.3281031458963746,
            0.6495419288047497,
        ),
    ],
)
def test_scipy_documented_examples(f_obs, f_exp, x2, p_x2, g2, p_g2):
    f_obs = np.asarray(f_obs, float)
    probs = np.full(6, 1 / 6) if f_exp is None else np.asarray(f_exp, float) / np.sum(f_exp)
    m = divergence_map(f_obs, probs)
    assert m.members["pearson"] == pytest.approx(x2, rel=1e-12)
    assert m.members["likelihood-ratio"] == pytest.approx(g2, rel=1e-12)
    assert stats.chi2.sf(m.members["pearson"], 5) == pytest.approx(p_x2, rel=1e-10)
    assert stats.chi2.sf(m.members["likelihood-ratio"], 5) == pytest.approx(p_g2, rel=1e-10)


def test_grades_example_p_value():
    m = divergence_map([22, 38, 20, 11], [0.32, 0.41, 0.20, 0.07])
    # source: Yates/Moore/Starnes, The Practice of Statistics, solutions ex. 14.3: X2 = 5.297, P = 0.1513
    assert m.members["pearson"] == pytest.approx(5.297, abs=5e-4)
    assert stats.chi2.sf(m.members["pearson"], 3) == pytest.approx(0.1513, abs=5e-5)


def test_left_handed_example():
    m = divergence_map([20, 130], [0.1, 0.9])
    # source: scipy.stats.chisquare([20, 130], [15, 135]): X2 = 1.851852, p = 0.173568 (docs/method.md §13.1)
    assert m.members["pearson"] == pytest.approx(1.851852, abs=5e-7)
    assert stats.chi2.sf(m.members["pearson"], 1) == pytest.approx(0.1736, abs=2e-4)


def test_freeman_tukey_and_neyman_members():
    counts, probs = COUNT_VECTORS[3], PROBS[3]
    m = divergence_map(counts, probs)
    # source: scipy.stats.power_divergence lambda_ = "freeman-tukey" (-1/2) and "neyman" (-2)
    assert m.members["freeman-tukey"] == pytest.approx(
        stats.power_divergence(counts, counts.sum() * probs, lambda_="freeman-tukey").statistic, rel=1e-12
    )
    assert m.members["neyman"] == pytest.approx(
        stats.power_divergence(counts, counts.sum() * probs, lambda_="neyman").statistic, rel=1e-12
    )
    assert set(m.members) == set(CLASSICAL_MEMBERS)


# --------------------------------------------------------------------------------------------
# Numerical stability (docs/method.md §2.5)
# --------------------------------------------------------------------------------------------
def _mp_phi(x: float, a: float):
    mpmath.mp.dps = 60
    x, a = mpmath.mpf(x), mpmath.mpf(a)
    if a == 1:
        return x * mpmath.log(x) - x + 1
    if a == 0:
        return x - 1 - mpmath.log(x)
    return (x**a - 1 - a * (x - 1)) / (a * (a - 1))


@pytest.mark.parametrize("x", [1 + 2**-40, 1 - 1e-9, 1 + 1e-7, 1.0001, 0.999, 0.5, 2.0, 1e-5, 1e5, 3.7])
@pytest.mark.parametrize("alpha", [-1.0, -0.5, 0.0, 1e-9, -1e-9, 0.5, 1 - 1e-9, 1.0, 1 + 1e-9, 5 / 3, 2.0, 3.0])
def test_power_generator_relative_accuracy(x, alpha):
    ref = _mp_phi(x, alpha)  # source: mpmath at 60 digits (docs/method.md §2.5)
    assert abs(power_generator(x, alpha) - ref) <= 1e-12 * abs(ref)


def test_power_generator_has_no_nan_on_extreme_arguments():
    x = np.array([1e-300, 1e-200, 1e-30, 1.0, 1e30, 1e200, 1e300])
    for a in [-3.0, -1.0, 0.0, 0.5, 1.0, 2.0, 3.0]:
        v = power_generator(x, a)
        assert not np.isnan(v).any() and (v >= 0).all()


def test_extreme_probabilities_stay_finite_where_the_value_is_finite():
    p = np.array([1e-290, 1 - 1e-290])
    q = np.array([0.5, 0.5])
    # alpha = -1, beta = 1 (m = p): b = q x^2 phi_{-1}(x) ~ q x / 2 -> tiny but finite
    v = scaled_bregman(p, q, -1.0, 1.0, "geometric")
    direct = 0.5 * np.sum((p - q) ** 2 / p)  # source: docs/method.md §3.2: alpha = 2 with m = p is Neyman/2;
    assert np.isfinite(v)
    assert np.isfinite(scaled_bregman(p, q, 2.0, 1.0, "geometric"))
    assert scaled_bregman(p, q, 2.0, 1.0, "geometric") == pytest.approx(direct, rel=1e-12)


# --------------------------------------------------------------------------------------------
# Grid path = element-wise path; batch = loop
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    "scaling,r", [("geometric", None), ("power", 1.0), ("power", -0.5), ("model", None), ("data", None), ("unit", None)]
)
def test_map_equals_elementwise_definition(scaling, r, rng):
    counts = rng.poisson(3.0, size=(6, 7)).astype(float)
    counts[0, 2] = 0
    probs = rng.dirichlet(np.full(7, 4.0))
    m = divergence_map(counts, probs, DEFAULT_ALPHAS, DEFAULT_BETAS, scaling, r)
    for i in range(counts.shape[0]):
        n = counts[i].sum()
        ref = 2 * n * scaled_bregman(counts[i] / n, probs, DEFAULT_ALPHAS[:, None], DEFAULT_BETAS[None, :], scaling, r)
        assert np.allclose(m.statistic[i], ref, rtol=1e-11, atol=1e-12, equal_nan=False)
        assert np.array_equal(np.isinf(m.statistic[i]), np.isinf(ref))


def test_row_and_summary(rng):
    counts = rng.multinomial(200, np.full(10, 0.1), size=5)
    m = divergence_map(counts, np.full(10, 0.1))
    for i in range(5):
        single = divergence_map(counts[i], np.full(10, 0.1))
        row = m.row(i)
        assert np.allclose(row.statistic, single.statistic, rtol=1e-13)
        assert row.t_max == pytest.approx(single.t_max) and row.argmax == single.argmax
        finite = single.statistic[~single.infinite]
        assert single.t_max == finite.max()
        assert single.statistic[single.argmax] == single.t_max
    d = m.row(0).to_dict()
    assert d["cells"] == 10 and len(d["statistic"]) == len(DEFAULT_ALPHAS)


def test_all_infinite_grid_reports_no_maximum():
    m = divergence_map([5, 5, 2], [0.5, 0.5, 0.0], [1.0], [0.5])
    assert m.t_max == math.inf and m.argmax == (-1, -1)


# --------------------------------------------------------------------------------------------
# Clear errors
# --------------------------------------------------------------------------------------------
def test_error_probabilities_do_not_sum_to_one():
    with pytest.raises(InputError, match=r"must sum to 1 .*tolerance .*sums to 0\.9"):
        divergence_map([1, 2, 3], [0.3, 0.3, 0.3])


def test_error_negative_counts():
    with pytest.raises(InputError, match="non-negative; smallest is -1"):
        divergence_map([1, -1, 3], [0.3, 0.3, 0.4])


def test_error_shape_mismatch():
    with pytest.raises(InputError, match=r"does not match counts"):
        divergence_map([1, 2, 3], [0.5, 0.5])
    with pytest.raises(InputError, match=r"p has 3 cells but q has 2"):
        scaled_bregman([0.2, 0.3, 0.5], [0.5, 0.5], 1.0)


def test_error_unknown_scaling_lists_valid_ones():
    with pytest.raises(
        InputError,
        match=r"Unknown scaling 'harmonic'; valid scalings are 'geometric', 'power', 'model', 'data', 'unit'",
    ):
        divergence_map([1, 2, 3], [0.3, 0.3, 0.4], scaling="harmonic")


def test_error_power_needs_r_and_beta_range():
    with pytest.raises(InputError, match="needs the exponent r"):
        scaled_bregman([0.5, 0.5], [0.5, 0.5], 1.0, 0.5, "power")
    with pytest.raises(InputError, match=r"beta .* must lie in \[0, 1\]"):
        scaled_bregman([0.5, 0.5], [0.5, 0.5], 1.0, 1.5)
    with pytest.raises(InputError, match="sums to zero"):
        divergence_map([0, 0], [0.5, 0.5])
    with pytest.raises(InputError, match="NaN"):
        divergence_map([1, np.nan], [0.5, 0.5])


# --------------------------------------------------------------------------------------------
# Properties (hypothesis)
# --------------------------------------------------------------------------------------------
SCALINGS_R = st.sampled_from(
    [
        ("geometric", None),
        ("power", 1.0),
        ("power", -1.0),
        ("power", 0.5),
        ("model", None),
        ("data", None),
        ("unit", None),
    ]
)
COUNTS = st.lists(st.integers(min_value=0, max_value=500), min_size=2, max_size=12).filter(lambda c: sum(c) > 0)


@settings(max_examples=150, deadline=None)
@given(
    counts=COUNTS,
    sr=SCALINGS_R,
    alphas=st.lists(st.floats(-3, 4, allow_nan=False), min_size=1, max_size=4),
    betas=st.lists(st.floats(0, 1), min_size=1, max_size=3),
)
def test_property_non_negative_never_nan(counts, sr, alphas, betas):
    s = len(counts)
    m = divergence_map(counts, np.full(s, 1 / s), alphas, betas, *sr)
    assert not np.isnan(m.statistic).any()
    assert (m.statistic >= 0).all()
    assert not np.isnan(m.t_max)


@settings(max_examples=100, deadline=None)
@given(
    q=st.lists(st.integers(1, 50), min_size=2, max_size=10),
    sr=SCALINGS_R,
    alpha=st.floats(-2, 3.5),
    beta=st.floats(0, 1),
)
def test_property_zero_iff_equal(q, sr, alpha, beta):
    q = np.asarray(q, float) / np.sum(q)
    assert scaled_bregman(q, q, alpha, beta, *sr) == 0.0
    p = np.roll(q, 1)
    if not np.allclose(p, q):
        assert scaled_bregman(p, q, alpha, beta, *sr) > 0.0


@settings(max_examples=100, deadline=None)
@given(counts=COUNTS, c=st.integers(2, 50), sr=SCALINGS_R)
def test_property_homogeneity_in_the_counts(counts, c, sr):
    """B(cN, cnQ | cnM) = c B(N, nQ | nM): multiplying every count by c multiplies T = 2nB by c."""
    if sr[0] == "unit":
        return  # m = 1 is not a scaling mean of the measures, so it is not homogeneous
    s = len(counts)
    probs = np.arange(1, s + 1, dtype=float) / (s * (s + 1) / 2)
    base = divergence_map(counts, probs, [-0.5, 0.5, 1.0, 2.0], [0.0, 0.5], *sr).statistic
    scaled = divergence_map(np.asarray(counts) * c, probs, [-0.5, 0.5, 1.0, 2.0], [0.0, 0.5], *sr).statistic
    assert np.allclose(scaled, c * base, rtol=1e-9, atol=1e-9) and np.array_equal(np.isinf(scaled), np.isinf(base))


@settings(max_examples=40, deadline=None)
@given(rows=st.lists(COUNTS.filter(lambda c: len(c) == 5), min_size=1, max_size=6), sr=SCALINGS_R)
def test_property_batch_equals_loop(rows, sr):
    probs = np.array([0.1, 0.2, 0.3, 0.25, 0.15])
    batch = divergence_map(np.array(rows), probs, DEFAULT_ALPHAS, DEFAULT_BETAS, *sr)
    for i, row in enumerate(rows):
        single = divergence_map(row, probs, DEFAULT_ALPHAS, DEFAULT_BETAS, *sr)
        assert np.allclose(batch.statistic[i], single.statistic, rtol=1e-13, atol=0) or np.array_equal(
            batch.statistic[i], single.statistic
        )
        assert batch.t_max[i] == pytest.approx(single.t_max)


@pytest.mark.parametrize("scaling", ["geometric", "model", "data"])
def test_a_map_without_its_classical_members_has_the_same_statistics(scaling):
    """``members=False`` (the null tables and the gate read only the statistics) leaves the members
    out and changes nothing else, for a batch and a single vector, empty cells included."""
    rng = np.random.default_rng(9)
    counts = rng.multinomial(60, np.full(12, 1 / 12), size=40).astype(float)
    counts[0, :3] = 0.0
    q = np.full(12, 1 / 12)
    for c in (counts, counts[0]):
        full = divergence_map(c, q, scaling=scaling)
        bare = divergence_map(c, q, scaling=scaling, members=False)
        assert bare.members == {} and set(full.members) == {
            "pearson",
            "likelihood-ratio",
            "cressie-read-2/3",
            "freeman-tukey",
            "neyman",
        }
        np.testing.assert_array_equal(bare.statistic, full.statistic)
        np.testing.assert_array_equal(bare.infinite, full.infinite)
        np.testing.assert_array_equal(bare.t_max, full.t_max)
        np.testing.assert_array_equal(np.asarray(bare.argmax), np.asarray(full.argmax))


@pytest.mark.parametrize("scaling, r", [("geometric", None), ("power", 0.5), ("model", None), ("data", None)])
def test_many_rows_computed_per_distinct_cell_equal_each_row_alone(scaling, r):
    """Many rows of counts (a null table) are computed once per distinct cell and gathered; each
    row equals its map computed alone (to rounding: numpy's vectorised exp and log may differ in
    the last bit with the array's length), infinite points and empty cells included."""
    rng = np.random.default_rng(17)
    counts = rng.multinomial(40, np.full(12, 1 / 12), size=400).astype(float)  # 4,800 cells, some empty
    q = np.full(12, 1 / 12)
    betas = DEFAULT_BETAS[1:] if scaling == "power" else DEFAULT_BETAS
    batch = divergence_map(counts, q, DEFAULT_ALPHAS, betas, scaling, r, members=False)
    alone = np.stack([divergence_map(c, q, DEFAULT_ALPHAS, betas, scaling, r).statistic for c in counts])
    assert (counts == 0).any() and np.isinf(alone).any()
    np.testing.assert_array_equal(np.isinf(batch.statistic), np.isinf(alone))
    finite = np.isfinite(alone)
    np.testing.assert_allclose(batch.statistic[finite], alone[finite], rtol=1e-12, atol=1e-12)


# ------------------------------------------------------------------------------------------
# several partitions in one pass (the distribution gate)
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("scaling", "r"),
    [("geometric", None), ("power", 0.5), ("power", -1.0), ("model", None), ("data", None), ("unit", None)],
)
# 400 rows of 30 cells take the distinct-cell path (4,096 cells on), some partitions alone do not
@pytest.mark.parametrize("rows", [1, 5, 400])
def test_partition_statistics_equal_one_map_per_partition_bit_for_bit(scaling, r, rows):
    """Each partition's block equals ``divergence_map`` on that partition alone, exactly: the gate's
    statistics and their null tables must not move when computed in one pass."""
    rng = np.random.default_rng(7)
    parts = [np.full(3, 1 / 3), np.full(20, 1 / 20), np.array([0.01, 0.04, 0.45, 0.45, 0.04, 0.01])]
    probs = [*parts[:2], np.r_[parts[2][:5], 0.0, parts[2][5]]]  # a cell the model gives probability 0
    counts = [rng.multinomial(60, q, size=rows).astype(float) for q in probs]
    counts[1][:, 4] += counts[1][:, :4].sum(axis=1)  # empty cells (every partition still counts all 60 values)
    counts[1][:, :4] = 0.0
    counts[2][0, 5] = 1.0  # an observation where the model says none can be
    counts[2][0, 2] -= 1.0
    alphas, betas = np.array([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0]), np.array([0.0, 0.25, 1.0])
    together = partition_statistics(
        np.concatenate(counts, axis=1), np.concatenate(probs), [len(q) for q in probs], alphas, betas, scaling, r
    )
    assert together.shape == (rows, 3, alphas.size, betas.size)
    for i, (c, q) in enumerate(zip(counts, probs)):
        alone = divergence_map(c, q, alphas, betas, scaling, r, members=False).statistic
        np.testing.assert_array_equal(together[:, i], alone)
    assert np.isinf(together[0, 2]).any()  # the impossible cell is infinite, as alone


@pytest.mark.parametrize(
    ("counts", "probs", "sizes", "match"),
    [
        ([1, 2, 3], [0.5, 0.5, 1.0], (2, 2), "one after another"),
        ([1, 2, 3], [0.5, 0.5, 1.0], (3,), "sum to 1"),
        ([1, 2, 4], [0.5, 0.5, 1.0], (2, 1), "same values"),
        ([1, -2, 3], [0.5, 0.5, 1.0], (2, 1), "non-negative"),
        ([1, 2, 3], [0.5, 0.5, np.nan], (2, 1), "non-negative"),
    ],
)
def test_partition_statistics_refuses_inputs_that_are_not_partitions(counts, probs, sizes, match):
    with pytest.raises(InputError, match=match):
        partition_statistics(counts, probs, sizes, [1.0], [0.5])
