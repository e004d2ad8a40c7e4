"""Partitions of the probability-integral scale and the distribution gate over them.

Checks: tail-refined boundaries worked by hand; counts against numpy's histogram; gate members
against scipy's power-divergence statistics on unequal cells; cell-probability gradients of
unequal cells against central differences of scipy's distribution functions and a hand-worked
normal case; the Nikulin-Rao-Robson statistic on unequal cells against its chi-square limit;
empty-cell limits on unequal cells against an mpmath evaluation; settings round trips; seeded
quick size and power of the gate (docs/method.md, "Cells and partitions"; docs/validation.md).
"""

from __future__ import annotations

import dataclasses
import math

import mpmath
import numpy as np
import pytest
from scipy import stats

from fitaudit.core.audit import DEFAULT_GATE_MEMBERS, DEFAULT_PARTITIONS, AuditSettings, audit_series
from fitaudit.core.calibration import CalibrationCache, Gate, nrr_term
from fitaudit.core.cells import make_partition, make_partitions, tail_boundaries
from fitaudit.core.divergence import divergence_map
from fitaudit.core.exceptions import InputError, InsufficientDataError
from fitaudit.core.models import Arima
from fitaudit.core.noise import NoiseParams, get_law


# ------------------------------------------------------------------------------------------
# Boundaries and counts
# ------------------------------------------------------------------------------------------
def test_tail_boundaries_hand_worked_n200():
    # source: hand-worked: p0 = max(0.005, 1/200) = 0.005, K = min(floor(log2(100)), 5) = 5,
    # boundaries 0.005 * 100^(i/5) = 0.005, 0.012559, 0.031548, 0.079245, 0.199054, then 0.5, mirrored
    b = tail_boundaries(200)
    lower = [0.005, 0.01255943, 0.03154787, 0.07924466, 0.19905359]
    np.testing.assert_allclose(b[1:6], lower, rtol=2e-7)
    np.testing.assert_allclose(b[7:12], [1 - x for x in reversed(lower)], rtol=2e-7)
    assert b[0] == 0.0 and b[6] == 0.5 and b[-1] == 1.0


@pytest.mark.parametrize("n", [20, 56, 100, 200, 365, 1000, 10_000])
def test_tail_cells_grow_toward_the_median_and_hold_one_expected_observation(n):
    part = make_partition("tails", n)
    q = part.probs
    half = q[: part.s // 2]
    assert np.all(np.diff(half) >= -1e-15)  # every cell at least as probable as the one outside it
    np.testing.assert_allclose(q, q[::-1], atol=1e-15)  # mirrored about the median
    assert q[0] == pytest.approx(max(0.005, 1.0 / n))  # common practice: one expected count, never below 0.5 %
    assert q.sum() == pytest.approx(1.0)


def test_fixed_partitions_and_the_insufficient_rule():
    assert make_partition("terciles", 100).boundaries == (0.0, 1 / 3, 2 / 3, 1.0)
    assert make_partition("quartiles", 100).s == 4
    assert make_partition("equiprobable", 100, 2).s == 13  # the equiprobable rule (tests/test_cells.py)
    with pytest.raises(InsufficientDataError):
        make_partitions(("tails", "equiprobable"), 19, 0)  # the equiprobable rule keeps the insufficient verdict
    with pytest.raises(InputError, match="unknown partition kind 'coarse'"):
        make_partition("coarse", 100)


def test_partition_counts_match_numpy_histogram(rng):
    part = make_partition("tails", 300)
    u = rng.random((5, 300))
    edges = np.asarray(part.boundaries)
    ref = np.stack([np.histogram(row, bins=edges)[0] for row in u])  # source: numpy.histogram
    np.testing.assert_array_equal(part.counts(u), ref)
    np.testing.assert_array_equal(part.counts(u[0]), ref[0])


# ------------------------------------------------------------------------------------------
# Gate members against scipy on unequal cells
# ------------------------------------------------------------------------------------------
def test_gate_members_equal_scipy_power_divergence_on_unequal_cells(rng):
    n = 240
    u = rng.random(n) ** 1.3  # not uniform, so the statistics are far from zero
    gate = Gate(make_partitions(("terciles", "equiprobable", "tails"), n, 0), *zip(*DEFAULT_GATE_MEMBERS))
    g = gate.statistics(u)
    for i, part in enumerate(gate.partitions):
        obs = part.counts(u)
        exp = n * part.probs
        for j, lam in enumerate((0.0, 2.0 / 3.0, 1.0)):  # G2, Cressie-Read 2/3, X2 (lambda = alpha - 1)
            ref = stats.power_divergence(obs, exp, lambda_=lam).statistic  # source: scipy.stats.power_divergence
            assert g[i, j] == pytest.approx(ref, rel=1e-10)


# ------------------------------------------------------------------------------------------
# Cell-probability gradients and the NRR term on unequal cells
# ------------------------------------------------------------------------------------------
def test_gradient_on_unequal_cells_hand_worked_normal():
    # source: hand-worked: cells (-inf, -1), [-1, 0), [0, inf) of N(0, 1); dF(c)/dloc = -phi(c),
    # dF(c)/dscale = -c phi(c); phi(1) = 0.2419707, phi(0) = 0.3989423 (normal density, common practice)
    b = np.array([0.0, stats.norm.cdf(-1.0), 0.5, 1.0])
    g = get_law("normal").cell_probability_gradient(b, NoiseParams("normal", 0.0, 1.0, None, ("loc", "scale")))
    expected = np.array([[-0.2419707, 0.2419707], [-0.3989423 + 0.2419707, -0.2419707], [0.3989423, 0.0]])
    np.testing.assert_allclose(g, expected, atol=1e-7)


@pytest.mark.parametrize("name", ["normal", "logistic", "laplace", "student-t"])
def test_gradient_on_tail_cells_matches_finite_differences(name):
    # source: central differences of scipy.stats cdf at fixed cell boundaries
    law = get_law(name)
    shape = 6.0 if name == "student-t" else None
    est = ("loc", "scale", "shape") if name == "student-t" else ("loc", "scale")
    params = NoiseParams(name, -0.2, 0.8, shape, est)
    b = np.asarray(tail_boundaries(150))
    G = law.cell_probability_gradient(b, params)
    frozen = {"normal": stats.norm, "logistic": stats.logistic, "laplace": stats.laplace}

    def cdf(x, th):
        if name == "student-t":
            return stats.t.cdf(x, th[2], loc=th[0], scale=th[1])
        return frozen[name].cdf(x, loc=th[0], scale=th[1])

    theta0 = np.array([-0.2, 0.8] + ([shape] if shape else []))
    if name == "student-t":
        cuts = stats.t.ppf(b[1:-1], shape, loc=-0.2, scale=0.8)
    else:
        cuts = frozen[name].ppf(b[1:-1], loc=-0.2, scale=0.8)
    num = np.zeros_like(G)
    for i in range(theta0.size):
        h = 1e-6
        up, down = theta0.copy(), theta0.copy()
        up[i] += h
        down[i] -= h
        fu = np.concatenate([[0.0], cdf(cuts, up), [1.0]])
        fd = np.concatenate([[0.0], cdf(cuts, down), [1.0]])
        num[:, i] = np.diff(fu - fd) / (2 * h)
    np.testing.assert_allclose(G, num, atol=1e-6 if name == "laplace" else 1e-7)


def test_nrr_on_tail_cells_restores_the_chi_square_limit():
    """X2 + NRR on unequal cells with ML location and scale of normal samples is chi-square(s - 1)
    (Nikulin 1973; Rao and Robson 1974): rejection at the 5 % point near 5 %."""
    rng = np.random.default_rng(1974)
    law = get_law("normal")
    n, reps = 600, 1500
    part = make_partition("tails", n)
    crit = stats.chi2.ppf(0.95, part.s - 1)
    x = rng.standard_normal((reps, n))
    loc, scale, _ = law.fit_batch(x, location=True)
    hits = 0
    for i in range(reps):
        p = NoiseParams("normal", float(loc[i]), float(scale[i]), None, ("loc", "scale"))
        u = law.cdf(x[i], p)
        obs = part.counts(u)
        x2 = stats.chisquare(obs, n * part.probs).statistic
        extra = nrr_term(
            obs, law.fisher_information(p), law.cell_probability_gradient(np.asarray(part.boundaries), p), part.probs
        )
        hits += x2 + extra > crit
    # common practice: 1500 replicates, binomial sd 0.0056; 4 sd either side of 0.05
    assert 0.028 <= hits / reps <= 0.072


def test_nrr_with_equal_probs_equals_the_equiprobable_form(rng):
    law = get_law("normal")
    p = NoiseParams("normal", 0.1, 1.2, None, ("loc", "scale"))
    counts = np.array([9.0, 14, 11, 6, 10, 10])
    g = law.cell_probability_gradient(6, p)
    assert nrr_term(counts, law.fisher_information(p), g) == pytest.approx(
        nrr_term(counts, law.fisher_information(p), g, np.full(6, 1 / 6)), rel=1e-12
    )


# ------------------------------------------------------------------------------------------
# Empty cells on unequal cells
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("alpha,beta", [(1.0, 0.0), (5.0 / 3.0, 0.0), (2.0, 0.0), (0.5, 0.5), (3.0, 0.0)])
def test_empty_tail_cell_limit_matches_mpmath(alpha, beta):
    """A statistic with an empty outer cell equals the limit p_j -> 0 evaluated in 60-digit arithmetic."""
    part = make_partition("tails", 200)
    q = part.probs
    counts = np.round(200 * q).astype(float)
    counts[0] = 0.0
    counts[6] += 200 - counts.sum()
    n = counts.sum()
    got = divergence_map(counts, q, [alpha], [beta]).statistic[0, 0]
    mpmath.mp.dps = 60
    a, b = mpmath.mpf(alpha), mpmath.mpf(beta)
    eps = mpmath.mpf("1e-400")  # x^(beta (1 - alpha)) decays slowly (x^0.25 for alpha = beta = 1/2)
    ps = [mpmath.mpf(c) / n for c in counts]
    ps[0] = eps
    total = 0
    for pj, qj in zip(ps, q):
        qj = mpmath.mpf(float(qj))
        x = pj / qj
        phi = x * mpmath.log(x) - x + 1 if a == 1 else (x**a - 1 - a * (x - 1)) / (a * (a - 1))
        total += qj * (x**b) ** (1 - a) * phi  # geometric scaling m = p^beta q^(1 - beta)
    ref = float(2 * n * total)  # source: mpmath, 60 digits, p_j = 1e-400 (docs/method.md, boundary limits)
    assert got == pytest.approx(ref, rel=1e-9)


# ------------------------------------------------------------------------------------------
# Settings
# ------------------------------------------------------------------------------------------
def test_settings_round_trip_with_partitions():
    s = AuditSettings(partitions=("tails", "quartiles"), gate_members=[[2, 0], [1, 0.5]], replicates=199)
    d = s.to_dict()
    assert d["partitions"] == ["tails", "quartiles"] and d["gate_members"] == [[2.0, 0.0], [1.0, 0.5]]
    assert AuditSettings(**d) == s and hash(AuditSettings(**d)) == hash(s)
    assert AuditSettings().partitions == DEFAULT_PARTITIONS and AuditSettings().gate_members == DEFAULT_GATE_MEMBERS
    full = AuditSettings(gate_members=None).gate(200, 2)
    assert len(full.alphas) == 17 * 9  # the whole grid


@pytest.mark.parametrize(
    "kwargs,match",
    [
        ({"partitions": ()}, "partitions must be distinct kinds"),
        ({"partitions": ("tails", "tails")}, "partitions must be distinct kinds"),
        ({"partitions": ("deciles",)}, "partitions must be distinct kinds"),
        ({"gate_members": ((2.0,),)}, "gate_members must be"),
        ({"gate_members": ((2.0, 1.5),)}, "beta in \\[0, 1\\]"),
    ],
)
def test_settings_refuse_bad_partitions(kwargs, match):
    with pytest.raises(InputError, match=match):
        AuditSettings(**kwargs)


# ------------------------------------------------------------------------------------------
# The gate in an audit: reasons, size and power (seeded, wide tolerances)
# ------------------------------------------------------------------------------------------
AR1 = Arima(order=(1, 0, 0), trend="c")
TRUTH = {"ar1": 0.6, "intercept": 10.0, "sigma2": 1.0}
FAST = AuditSettings(replicates=199, locate_change=False, audit_window=56)
PEARSON_TODAY = dataclasses.replace(FAST, partitions=("equiprobable",), gate_members=((2.0, 0.0),))


def test_failing_gate_names_the_cell_in_words():
    rng = np.random.default_rng(5)
    y = AR1.simulate(TRUTH, 300, rng)
    stored = dict(TRUTH, sigma2=0.25)  # the production version understates the variance four-fold
    res = audit_series(y, AR1, production=stored, settings=FAST)
    deciding = res.production.gate["deciding"]
    assert deciding["kind"] in DEFAULT_PARTITIONS
    stats = next(r for r in res.reasons if r.startswith("Production check"))
    assert "of the assumed law holds" in stats and "were expected" in stats
    assert "times as variable as the model assumes" in res.reasons[0]  # the plain sentence leads
    assert [p["kind"] for p in res.production.gate["partitions"]] == list(DEFAULT_PARTITIONS)
    assert sum(res.production.gate["partitions"][0]["counts"]) == 56


@pytest.mark.slow
def test_quick_power_heavy_tails_beats_pearson_on_equiprobable_cells():
    """t(3) innovations audited as normal (n = 200): the gate over partitions rejects more often than
    Pearson on the equiprobable cells (docs/validation.md: about 0.93 against 0.77)."""
    cache = CalibrationCache()
    ours = pearson = 0
    reps = 120
    rng = np.random.default_rng(303)
    for i in range(reps):
        shocks = rng.standard_t(3, 200) / math.sqrt(3.0)
        y = AR1.simulate(TRUTH, 200, rng, innovations=shocks)
        settings = dataclasses.replace(FAST, seed=i % 5)
        ours += audit_series(y, AR1, settings=settings, cache=cache).refit.p_distribution <= 0.05
        pearson += (
            audit_series(
                y, AR1, settings=dataclasses.replace(PEARSON_TODAY, seed=i % 5), cache=cache
            ).refit.p_distribution
            <= 0.05
        )
    # common practice: 120 series, binomial sd about 0.04 each; the study's gap is 0.16
    assert ours / reps >= 0.80
    assert ours > pearson
