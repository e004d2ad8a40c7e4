"""Shared contracts of every model family and every noise law, in the spirit of scikit-learn's
estimator checks: one parametrised suite that each registered family and each law must pass.

A family or law added to ``fitaudit.core.models.FAMILIES`` or ``fitaudit.core.noise.NOISE_LAWS``
fails ``test_every_family_has_a_case`` / ``test_every_law_has_a_case`` until it is given a case
here, so it cannot join the registry without passing the shared checks.

Families: fit converges and returns the family's ``param_names``; residuals, ``errors`` and
``production_errors`` are aligned with the series and undefined (NaN) exactly on the presample;
one-step errors use the past only; a fit on a long simulated series recovers the parameters
within three standard errors; specs round-trip through ``to_dict`` / ``model_from_dict``.

Laws (the protocol of ``fitaudit.core.noise.NoiseLaw``): ``pit`` of ``simulate`` draws lies in
[0, 1] and is uniform (Kolmogorov-Smirnov, scipy); ``fit_errors`` recovers the parameters;
``frozen_params`` has the production variance (scipy's variances); cell probabilities sum to 1
and their gradients to 0 by column, and the gradients equal central differences of
``cell_probabilities``; the capability flags say exactly which methods a law has.
"""

from __future__ import annotations

import dataclasses
import json
import pickle

import numpy as np
import pytest
from scipy import stats

from fitaudit.core.exceptions import InputError, SpecificationError
from fitaudit.core.models import FAMILIES, Arima, ExpSmoothing, NonlinearAR, model_from_dict
from fitaudit.core.noise import NOISE_LAWS, NoiseParams, get_law

# --------------------------------------------------------------------------------------------
# Model families
# --------------------------------------------------------------------------------------------
# One small valid spec per registered family, the truth it is simulated from, and the parameters
# without a standard error with their absolute tolerance (SETAR's threshold and delay are not
# asymptotically normal: the delay is estimated exactly and the threshold super-consistently).
FAMILY_CASES = {
    "arima": (Arima(order=(1, 0, 1), trend="c"), {"ar1": 0.6, "ma1": 0.3, "intercept": 5.0, "sigma2": 2.0}, {}),
    "smoothing": (ExpSmoothing(trend="add"), {"alpha": 0.4, "beta": 0.1, "l0": 10.0, "b0": 0.2, "sigma2": 1.0}, {}),
    "nonlinear-ar": (
        NonlinearAR(function="setar", lags=(1,)),
        {"c1": 0.5, "ar1_1": 0.6, "c2": -0.5, "ar2_1": -0.3, "threshold": 0.0, "delay": 1.0, "sigma2": 0.5},
        # source: Chan, Ann. Statist. 21, 1993, p. 520 (the least-squares threshold converges at
        # rate n, the delay is found exactly with probability tending to 1; from memory)
        {"threshold": 0.05, "delay": 0.0},
    ),
}
N_SIM = 2000


def test_every_family_has_a_case():
    assert set(FAMILY_CASES) == set(FAMILIES)  # source: fitaudit.core.models.FAMILIES (the registry)


@pytest.fixture(scope="module")
def fitted():
    """Each family's spec, truth, simulated series and fit (simulated and fitted once)."""
    out = {}
    for i, (family, (spec, truth, nonregular)) in enumerate(sorted(FAMILY_CASES.items())):
        y = spec.simulate(truth, N_SIM, np.random.default_rng(2026 + i))
        out[family] = (spec, truth, nonregular, y, spec.fit(y))
    return out


@pytest.mark.parametrize("family", sorted(FAMILY_CASES))
def test_fit_converges_with_the_familys_parameter_names(fitted, family):
    spec, truth, _, y, fit = fitted[family]
    assert fit.converged, fit.message
    assert list(fit.params) == spec.param_names()  # source: ForecastModel protocol (core/models/_base.py)
    assert list(truth) == spec.param_names()  # the case states every parameter, in order
    assert fit.spec == spec and fit.spec is not spec  # source: ForecastModel protocol (fitting never mutates the spec)
    assert fit.sigma2 == fit.params["sigma2"] > 0  # common practice: sigma2 is the innovation variance
    assert set(fit.extras["bse"]) | set(FAMILY_CASES[family][2]) == set(fit.params)


@pytest.mark.parametrize("family", sorted(FAMILY_CASES))
def test_errors_are_aligned_and_undefined_exactly_on_the_presample(fitted, family):
    spec, _, _, y, fit = fitted[family]
    p = spec.presample()
    for name, e in (
        ("residuals", fit.residuals),
        ("errors", spec.errors(y, fit.params)),
        ("production_errors", spec.production_errors(y, fit.params)),
    ):
        assert e.shape == y.shape, name  # source: ForecastModel protocol (aligned to y)
        assert np.isnan(e[:p]).all() and np.isfinite(e[p:]).all(), name  # source: ForecastModel.presample
    # source: residual identity (the errors at the fitted parameters are the fit's residuals)
    np.testing.assert_array_equal(spec.errors(y, fit.params), fit.residuals)


@pytest.mark.parametrize("family", sorted(FAMILY_CASES))
def test_one_step_errors_use_the_past_only(fitted, family):
    spec, _, _, y, fit = fitted[family]
    m = N_SIM // 2
    # common practice: a one-step predictor is causal, so a longer series leaves earlier errors unchanged
    np.testing.assert_allclose(spec.errors(y[:m], fit.params), spec.errors(y, fit.params)[:m], rtol=0, atol=1e-10)


@pytest.mark.parametrize("family", sorted(FAMILY_CASES))
def test_simulation_round_trip_recovers_the_parameters(fitted, family):
    spec, truth, nonregular, _, fit = fitted[family]
    for name, value in truth.items():
        if name in nonregular:
            assert abs(fit.params[name] - value) <= nonregular[name], name
            continue
        se = fit.extras["bse"][name]
        assert np.isfinite(se) and se > 0, name
        # source: asymptotic normality of the maximum-likelihood estimate; 3 standard errors is common practice
        assert abs(fit.params[name] - value) < 3.0 * se, (name, fit.params[name], value, se)


@pytest.mark.parametrize("family", sorted(FAMILY_CASES))
def test_spec_round_trips_through_its_dict(fitted, family):
    spec, _, _, _, fit = fitted[family]
    plain = json.loads(json.dumps(spec.to_dict()))  # the registry and results.json hold this form
    assert plain["family"] == family  # source: fitaudit.core.models.FAMILIES keys
    again = model_from_dict(plain)
    assert again == spec and type(again) is type(spec)  # source: model_from_dict is the inverse of to_dict
    assert again.to_dict() == spec.to_dict() and again.param_names() == spec.param_names()
    assert fit.to_dict()["spec"] == spec.to_dict()
    assert pickle.loads(pickle.dumps(spec)) == spec  # specs travel to worker processes


# --------------------------------------------------------------------------------------------
# Noise laws
# --------------------------------------------------------------------------------------------
# Every registered law with its shape estimated, and the laws with a shape also with it fixed;
# the truth each is simulated from (loc and scale of location-scale laws; counts take a mean per
# time point and store loc 0, scale 1).
LAW_CASES = {
    "normal": (get_law("normal"), NoiseParams("normal", 0.3, 1.7, None)),
    "student-t": (get_law("student-t"), NoiseParams("student-t", 0.3, 1.7, 5.0)),
    "student-t(5)": (get_law("student-t", shape=5), NoiseParams("student-t", 0.3, 1.7, 5.0)),
    "laplace": (get_law("laplace"), NoiseParams("laplace", 0.3, 1.7, None)),
    "logistic": (get_law("logistic"), NoiseParams("logistic", 0.3, 1.7, None)),
    "poisson": (get_law("poisson"), NoiseParams("poisson", 0.0, 1.0, None)),
    "negative-binomial": (get_law("negative-binomial"), NoiseParams("negative-binomial", 0.0, 1.0, 3.0)),
    "negative-binomial(3)": (get_law("negative-binomial", shape=3), NoiseParams("negative-binomial", 0.0, 1.0, 3.0)),
}
LAWS = sorted(LAW_CASES)
# scipy.stats counterpart of each location-scale law (the reference for variances and quantiles)
SCIPY = {"normal": stats.norm, "student-t": stats.t, "laplace": stats.laplace, "logistic": stats.logistic}


def scipy_law(params: NoiseParams):
    dist = SCIPY[params.law]
    args = () if params.shape is None else (params.shape,)
    return dist(*args, loc=params.loc, scale=params.scale)


def _means(n: int, rng: np.random.Generator) -> np.ndarray:
    """One-step means that vary over time (counts: between 1 and 10)."""
    return rng.uniform(1.0, 10.0, n)


def test_every_law_has_a_case():
    assert {law.name for law, _ in LAW_CASES.values()} == set(NOISE_LAWS)  # source: fitaudit.core.noise.NOISE_LAWS


@pytest.mark.parametrize("case", LAWS)
def test_pit_of_simulated_draws_is_uniform(case):
    law, truth = LAW_CASES[case]
    rng = np.random.default_rng(7)
    mean = _means(2000, rng)
    y = law.simulate(mean, rng, truth)
    assert y.shape == mean.shape
    u = law.pit(y - mean, truth, rng, y=y)
    assert u.shape == y.shape and ((u >= 0) & (u <= 1)).all()  # source: definition of a distribution function
    # source: scipy.stats.kstest against U(0, 1) (Dunn and Smyth 1996 for the randomised count PIT);
    # p > 0.001 is common practice for a seeded check
    assert stats.kstest(u, "uniform").pvalue > 0.001


@pytest.mark.parametrize("case", LAWS)
def test_pit_needs_the_observations_exactly_when_errors_are_not_identically_distributed(case):
    law, truth = LAW_CASES[case]
    rng = np.random.default_rng(8)
    mean = _means(50, rng)
    y = law.simulate(mean, rng, truth)
    if law.iid_errors:
        # source: NoiseLaw.pit (a location-scale PIT is a function of the errors alone)
        np.testing.assert_array_equal(law.pit(y - mean, truth), law.pit(y - mean, truth, rng, y=y))
    else:
        with pytest.raises(InputError, match="needs the observations"):
            law.pit(y - mean, truth, rng)


@pytest.mark.parametrize("case", LAWS)
def test_fit_errors_recovers_the_parameters(case):
    law, truth = LAW_CASES[case]
    rng = np.random.default_rng(9)
    n = 20000
    mean = _means(n, rng)
    y = law.simulate(mean, rng, truth)
    fitted = law.fit_errors(y - mean, location=True, y=y)
    assert fitted.law == law.name
    names = list(fitted.estimated)
    if law.pivotal:
        assert fitted.estimated == law.estimated_names(location=True)  # source: NoiseLaw.fit_errors
        values = {"loc": truth.loc, "scale": truth.scale, "shape": truth.shape}
        # standard errors from the law's own per-observation Fisher information
        cov = (
            np.linalg.inv(
                law.fisher_information(NoiseParams(law.name, truth.loc, truth.scale, truth.shape, fitted.estimated))
            )
            / n
        )
    else:
        # count laws estimate the negative-binomial size when it is free, nothing else
        assert fitted.estimated == (
            ("shape",) if law.has_shape and law.shape is None else ()
        )  # source: NoiseLaw.fit_errors
        values = {"shape": truth.shape}
        cov = (
            np.atleast_2d(1.0 / _observed_information_of_size(law, y, mean, truth.shape)) if names else np.zeros((0, 0))
        )
    for i, name in enumerate(names):
        se = float(np.sqrt(cov[i, i]))
        # source: asymptotic normality of the maximum-likelihood estimate; 4 standard errors is common practice
        assert abs(getattr(fitted, name) - values[name]) < 4.0 * se, (name, getattr(fitted, name), values[name], se)
    if not (law.has_shape and law.shape is None):
        assert fitted.shape == truth.shape  # a fixed shape is kept as given (None without one)


def _observed_information_of_size(law, y, mean, size: float) -> float:
    """Minus the second central difference of the log-likelihood in the size, at the truth."""
    h = 1e-3 * size

    def loglik(r):
        return float(np.sum(law.logpmf(y, mean, NoiseParams(law.name, 0.0, 1.0, r))))

    return -(loglik(size + h) - 2.0 * loglik(size) + loglik(size - h)) / h**2  # common practice: central differences


@pytest.mark.parametrize("case", LAWS)
def test_frozen_params_take_the_production_variance_or_the_means(case):
    law, truth = LAW_CASES[case]
    rng = np.random.default_rng(10)
    mean = _means(400, rng)
    y = law.simulate(mean, rng, truth)
    if law.pivotal:
        # a law whose shape is estimated needs the shape stored with the production version
        assert law.needs_stored_shape == (law.has_shape and law.shape is None)
        shape_law = get_law(law.name, shape=truth.shape) if law.needs_stored_shape else law
        frozen = shape_law.frozen_params({"sigma2": 2.5}, y - mean, y=y, label="m1")
        assert frozen.estimated == () and frozen.loc == 0.0
        assert scipy_law(frozen).var() == pytest.approx(2.5, rel=1e-12)  # source: scipy.stats variances
        with pytest.raises(InputError, match="m1: the production parameter version's sigma2 = -1"):
            shape_law.frozen_params({"sigma2": -1.0}, y - mean, y=y, label="m1")
    else:
        # count laws: the dispersion follows the means; a fixed size is kept, a free one is
        # estimated on the window with the same estimator as fit_errors (nothing is stored)
        assert not law.needs_stored_shape
        frozen = law.frozen_params({"sigma2": 2.5}, y - mean, y=y, label="m1")
        assert frozen == law.fit_errors(y - mean, y=y)  # source: NoiseLaw.frozen_params of count laws
        if law.has_shape and law.shape is None:
            assert frozen.estimated == ("shape",) and frozen.shape != truth.shape  # estimated, not copied
        else:
            assert (
                frozen.estimated == () and frozen.shape == truth.shape
            )  # source: the case's fixed size (None for poisson)


@pytest.mark.parametrize("case", LAWS)
def test_reference_quantiles_and_density_of_the_standardised_errors(case):
    law, truth = LAW_CASES[case]
    probs = (np.arange(1, 81) - 0.5) / 80
    q = law.reference_quantiles(probs, truth)
    assert q.shape == probs.shape and np.all(np.diff(q) > 0)  # source: quantile functions increase
    z = np.linspace(-4.0, 4.0, 9)
    density = law.reference_density(z, truth)
    if law.pivotal:
        standard = NoiseParams(truth.law, 0.0, 1.0, truth.shape)
        np.testing.assert_allclose(q, scipy_law(standard).ppf(probs), rtol=1e-9)  # source: scipy.stats ppf
        np.testing.assert_allclose(density, scipy_law(standard).pdf(z), rtol=1e-9)  # source: scipy.stats pdf
        e = np.array([truth.loc - truth.scale, truth.loc, truth.loc + 2 * truth.scale])
        np.testing.assert_allclose(law.standardise(e, truth), [-1.0, 0.0, 2.0], atol=1e-15)  # source: (e - loc) / scale
    else:
        assert density is None  # counts have no density on the scale of the standardised errors
        e = np.array([-2.0, 0.0, 2.0])
        np.testing.assert_allclose(law.standardise(e, truth), e / np.std(e))  # source: NoiseLaw.standardise (e / sd(e))


@pytest.mark.parametrize("case", LAWS)
def test_capability_flags_say_which_methods_a_law_has(case):
    law, truth = LAW_CASES[case]
    # source: NoiseLaw (core/noise.py): a flag is false exactly where a method is impossible
    assert hasattr(law, "fisher_information") == hasattr(law, "cell_probability_gradient") == law.has_fisher_information
    assert all(hasattr(law, m) for m in ("fit_batch", "cdf_batch", "sample_standard")) == law.pivotal
    assert hasattr(law, "randomized_pit") == (not law.pivotal)
    for method in (
        "fit_errors",
        "frozen_params",
        "pit",
        "simulate",
        "check_observations",
        "standardise",
        "reference_quantiles",
        "reference_density",
        "estimated_names",
        "n_estimated",
    ):
        assert callable(getattr(law, method)), method
    if not law.has_fisher_information:
        with pytest.raises(SpecificationError, match="does not apply"):
            law.cell_probability_gradient(10, truth)
    assert get_law(law.name, shape=law.shape) == law and pickle.loads(pickle.dumps(law)) == law


@pytest.mark.parametrize("case", LAWS)
def test_check_observations_refuses_only_what_the_law_cannot_describe(case):
    law, _ = LAW_CASES[case]
    law.check_observations(np.array([0.0, 3.0, 7.0]), "m1")  # counts are valid under every law
    if law.discrete:
        with pytest.raises(InputError, match="m1: .* needs counts .* first at position 1 \\(2.5\\)"):
            law.check_observations(np.array([1.0, 2.5, -1.0]), "m1")
    else:
        law.check_observations(np.array([1.0, 2.5, -1.0]), "m1")


# unequal cells as the tail-refined partition makes them, and equiprobable ones
BOUNDARIES = [10, np.array([0.0, 0.005, 0.05, 1 / 3, 2 / 3, 0.95, 0.995, 1.0])]


@pytest.mark.parametrize("cells", BOUNDARIES, ids=["equiprobable", "tails"])
@pytest.mark.parametrize("case", [c for c in LAWS if LAW_CASES[c][0].has_fisher_information])
def test_cell_probabilities_and_their_gradient(case, cells):
    law, truth = LAW_CASES[case]
    params = NoiseParams(truth.law, truth.loc, truth.scale, truth.shape, law.estimated_names(location=True))
    b = np.linspace(0.0, 1.0, cells + 1) if np.isscalar(cells) else cells
    q = law.cell_probabilities(cells, params)
    np.testing.assert_allclose(
        q, np.diff(b), rtol=0, atol=1e-13
    )  # source: definition of PIT cells at the parameters that fix them
    grad = law.cell_probability_gradient(cells, params)
    assert grad.shape == (b.size - 1, len(params.estimated))
    # source: the cell probabilities sum to 1 for every parameter, so each derivative sums to 0
    np.testing.assert_allclose(grad.sum(axis=0), 0.0, atol=1e-12)
    for j, name in enumerate(params.estimated):
        # a small step: the laplace density has a kink at its median, where central differences
        # converge at rate h rather than h^2
        h = 1e-7 * (truth.scale if name != "shape" else truth.shape)
        up = dataclasses.replace(params, **{name: getattr(params, name) + h})
        down = dataclasses.replace(params, **{name: getattr(params, name) - h})
        numeric = (law.cell_probabilities(cells, params, at=up) - law.cell_probabilities(cells, params, at=down)) / (
            2 * h
        )
        np.testing.assert_allclose(grad[:, j], numeric, rtol=0, atol=1e-7)  # common practice: central differences
