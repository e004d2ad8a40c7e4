"""Noise laws (fitaudit.core.noise) checked against scipy.stats and the published figures of docs/method.md."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, optimize, stats

from fitaudit.core.exceptions import ConvergenceWarning, InputError, InsufficientDataError, SpecificationError
from fitaudit.core.noise import (
    NB_SIZE_BOUNDS,
    NOISE_LAWS,
    STUDENT_T_DF_BOUNDS,
    NoiseParams,
    get_law,
)

CONTINUOUS = ["normal", "student-t", "laplace", "logistic"]
COUNT = ["poisson", "negative-binomial"]

# scipy.stats counterpart of each continuous law: (distribution, shape argument or None)
SCIPY = {"normal": stats.norm, "student-t": stats.t, "laplace": stats.laplace, "logistic": stats.logistic}


def scipy_frozen(params: NoiseParams):
    dist = SCIPY[params.law]
    if params.shape is None:
        return dist(loc=params.loc, scale=params.scale)
    return dist(params.shape, loc=params.loc, scale=params.scale)


def all_params(law_name: str, loc=0.7, scale=1.9, df=4.5):
    names = ("loc", "scale", "shape") if law_name == "student-t" else ("loc", "scale")
    return NoiseParams(law_name, loc, scale, df if law_name == "student-t" else None, names)


# --------------------------------------------------------------------------------------------
# Registry and validation
# --------------------------------------------------------------------------------------------
def test_registry_names():
    assert sorted(NOISE_LAWS) == sorted(CONTINUOUS + COUNT)  # source: docs/architecture.md §6 (noise law)
    for name in NOISE_LAWS:
        law = get_law(name)
        assert law.name == name
        assert law.discrete == (name in COUNT)


def test_unknown_law_lists_valid_names():
    with pytest.raises(InputError, match=r"Unknown noise law 'gauss'.*'normal'.*'negative-binomial'"):
        get_law("gauss")


@pytest.mark.parametrize(
    "name,shape", [("normal", 3.0), ("student-t", 2.0), ("student-t", -1), ("negative-binomial", 0.0)]
)
def test_invalid_shape(name, shape):
    with pytest.raises(InputError, match="shape"):
        get_law(name, shape=shape)


def test_n_estimated():
    # source: docs/method.md §8.2 (k = number of noise-law parameters estimated, location if an intercept is fitted)
    assert get_law("normal").n_estimated(location=True) == 2
    assert get_law("normal").n_estimated(location=False) == 1
    assert get_law("student-t").n_estimated(location=True) == 3
    assert get_law("student-t", shape=5).n_estimated(location=True) == 2
    assert get_law("poisson").n_estimated(location=False) == 0
    assert get_law("negative-binomial").n_estimated(location=False) == 1


def test_wrong_kind_of_method_is_a_clear_error(rng):
    with pytest.raises(SpecificationError, match="count law"):
        get_law("poisson").fit([1.0, 2.0, 3.0])
    with pytest.raises(SpecificationError, match="location-scale"):
        get_law("normal").randomized_pit([1, 2], [1.0, 2.0], all_params("normal"), rng)


def test_fit_input_errors():
    law = get_law("normal")
    with pytest.raises(InputError, match="NaN"):
        law.fit([1.0, np.nan, 2.0])
    with pytest.raises(InputError, match="all residuals equal"):
        law.fit([2.0, 2.0, 2.0, 2.0])
    with pytest.raises(InsufficientDataError, match="at least 4 residuals"):
        get_law("student-t").fit([0.1, 0.5, -0.2])
    with pytest.raises(InputError, match="belong to the 'laplace' law"):
        law.cdf(0.0, all_params("laplace"))


def test_params_to_dict():
    p = NoiseParams("student-t", 0.0, 1.5, 5.0, ("scale", "shape"))
    assert p.to_dict() == {"law": "student-t", "loc": 0.0, "scale": 1.5, "shape": 5.0, "estimated": ["scale", "shape"]}
    with pytest.raises(InputError, match="in that order"):
        NoiseParams("normal", 0.0, 1.0, None, ("scale", "loc"))


# --------------------------------------------------------------------------------------------
# Distribution functions against scipy.stats
# --------------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", CONTINUOUS)
def test_distribution_functions_match_scipy(name):
    law = get_law(name)
    params = all_params(name)
    ref = scipy_frozen(params)  # source: scipy.stats
    x = np.linspace(-12.0, 14.0, 105)
    np.testing.assert_allclose(law.cdf(x, params), ref.cdf(x), rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(law.logpdf(x, params), ref.logpdf(x), rtol=1e-12, atol=1e-13)
    np.testing.assert_allclose(law.pdf(x, params), ref.pdf(x), rtol=1e-12, atol=1e-15)
    u = np.linspace(0.001, 0.999, 99)
    np.testing.assert_allclose(law.ppf(u, params), ref.ppf(u), rtol=1e-10, atol=1e-12)
    assert law.ppf(0.0, params) == -np.inf and law.ppf(1.0, params) == np.inf


@pytest.mark.parametrize("name", CONTINUOUS)
def test_cdf_batch_matches_cdf_row_by_row(name, rng):
    law = get_law(name)
    X = rng.standard_normal((4, 25)) * 2
    loc, scale = np.array([0.0, 1.0, -2.0, 0.5]), np.array([1.0, 2.0, 0.5, 3.0])
    shape = np.array([3.0, 5.0, 10.0, 2.5]) if law.has_shape else None
    U = law.cdf_batch(X, loc, scale, shape)
    for r in range(4):
        params = NoiseParams(name, loc[r], scale[r], None if shape is None else shape[r])
        np.testing.assert_allclose(U[r], scipy_frozen(params).cdf(X[r]), rtol=1e-12)  # source: scipy.stats


@pytest.mark.parametrize("name", CONTINUOUS)
def test_from_variance_has_that_variance(name):
    law = get_law(name, shape=6.0) if name == "student-t" else get_law(name)
    params = law.from_variance(2.3, loc=0.4)
    assert params.estimated == ()
    assert scipy_frozen(params).var() == pytest.approx(2.3, rel=1e-12)  # source: scipy.stats .var()
    assert scipy_frozen(params).mean() == pytest.approx(0.4, rel=1e-12)  # source: scipy.stats .mean()


def test_from_variance_student_t_formula():
    # common practice: the t law with df degrees of freedom has variance df / (df - 2) times its scale
    # squared, so scale = sigma * sqrt((df - 2) / df); df = 5, sigma2 = 4 -> 2 * sqrt(3/5)
    p = get_law("student-t").from_variance(4.0, shape=5.0)
    assert p.scale == pytest.approx(2.0 * math.sqrt(0.6), rel=1e-14)
    with pytest.raises(InputError, match="needs its shape"):
        get_law("student-t").from_variance(4.0)


@pytest.mark.parametrize("name", CONTINUOUS)
def test_samples_follow_the_law(name, rng):
    law = get_law(name)
    params = all_params(name)
    x = law.sample(4000, rng, params)
    # source: scipy.stats.kstest against scipy's cdf; seeded, wide tolerance
    assert stats.kstest(x, scipy_frozen(params).cdf).pvalue > 1e-3
    z = law.sample_standard((2, 3), rng, shape=params.shape)
    assert z.shape == (2, 3)


# --------------------------------------------------------------------------------------------
# Maximum likelihood
# --------------------------------------------------------------------------------------------
def _scipy_fit(name, x, location):
    """scipy.stats .fit, with loc fixed at 0 when the location is not estimated."""
    dist = SCIPY[name]
    if location:
        est = dist.fit(x)
    else:
        est = dist.fit(x, floc=0.0)
    if name == "student-t":
        df, loc, scale = est
        return NoiseParams(name, loc, scale, df)
    loc, scale = est
    return NoiseParams(name, loc, scale, None)


@pytest.mark.parametrize("location", [True, False])
@pytest.mark.parametrize("name", CONTINUOUS)
def test_ml_fit_matches_scipy(name, location):
    rng = np.random.default_rng(11)
    x = 0.4 + 1.7 * rng.standard_t(5, size=300)
    ours = get_law(name).fit(x, location=location)
    ref = _scipy_fit(name, x, location)  # source: scipy.stats <law>.fit
    law = get_law(name)
    ll_ours = scipy_frozen(ours).logpdf(x).sum()
    ll_ref = scipy_frozen(ref).logpdf(x).sum()
    if name in ("normal", "laplace"):
        # closed forms: identical to scipy's analytic fit
        assert ours.loc == pytest.approx(ref.loc, rel=1e-12, abs=1e-12)
        assert ours.scale == pytest.approx(ref.scale, rel=1e-12)
    else:
        # scipy optimises numerically; ours must be at least as likely and close to it
        assert ll_ours >= ll_ref - 1e-9
        assert ours.loc == pytest.approx(ref.loc, abs=1e-4 * ref.scale)
        assert ours.scale == pytest.approx(ref.scale, rel=1e-4)
        if name == "student-t":
            assert ours.shape == pytest.approx(ref.shape, rel=1e-3)
    assert ours.estimated == law.estimated_names(location)
    if not location:
        assert ours.loc == 0.0


@pytest.mark.parametrize("location", [True, False])
@pytest.mark.parametrize("shape", [None, 6.0])
def test_student_t_row_sums_equal_the_generic_terms_and_scipy(location, shape):
    """The t law's Newton sums (log-likelihood, gradient, Hessian) equal the generic form built
    from ``_std_terms``; the log-likelihood equals scipy.stats.t's (source: scipy.stats.t.logpdf)."""
    from fitaudit.core.noise import _NewtonFittedLaw

    law = get_law("student-t", shape)
    rng = np.random.default_rng(31)
    Y = rng.standard_t(5, (6, 200))
    free = shape is None
    theta = rng.normal(0.0, 0.3, (6, int(location) + 1 + int(free)))
    if free:
        theta[:, -1] = np.log(rng.uniform(3.0, 40.0, 6))
    fused = law._loglik(theta, Y, True, location, free)
    generic = _NewtonFittedLaw._loglik(law, theta, Y, True, location, free)
    for ours, ref in zip(fused, generic):
        np.testing.assert_allclose(ours, ref, rtol=1e-10, atol=1e-9)
    nu = np.exp(theta[:, -1]) if free else np.full(6, shape)
    loc = theta[:, 0] if location else np.zeros(6)
    scale = np.exp(theta[:, int(location)])
    ref = stats.t.logpdf(Y, nu[:, None], loc[:, None], scale[:, None]).sum(axis=1)
    np.testing.assert_allclose(fused[0], ref, rtol=1e-12)


def test_normal_ml_scale_uses_n():
    x = np.array([1.0, 2.0, 4.0, 7.0])
    p = get_law("normal").fit(x)
    assert p.scale == pytest.approx(np.std(x, ddof=0), rel=1e-15)  # source: numpy std ddof=0 (ML, 1/n)


def test_student_t_df_bounds():
    rng = np.random.default_rng(12)
    normal_data = rng.standard_normal(2000)
    assert (
        get_law("student-t").fit(normal_data).shape == STUDENT_T_DF_BOUNDS[1]
    )  # common practice: normal data -> df at the cap
    cauchy_data = rng.standard_cauchy(300)
    assert get_law("student-t").fit(cauchy_data).shape == pytest.approx(
        STUDENT_T_DF_BOUNDS[0]
    )  # common practice: Cauchy -> lowest df


@pytest.mark.parametrize("name", ["student-t", "logistic"])
def test_batched_newton_stops_at_the_maximum(name):
    """The Newton decrement stop (core/noise.py, Boyd and Vandenberghe 2004, sec. 9.5.1) ends each
    row at its maximum: scipy's own fit, started from ours, finds no higher likelihood."""
    rng = np.random.default_rng(23)
    X = np.concatenate(
        [rng.standard_t(5, size=(12, 400)), rng.standard_normal((12, 400)), rng.logistic(size=(12, 400))]
    )
    law = get_law(name)
    loc, scale, shape = law.fit_batch(X)
    for i, x in enumerate(X):
        if name == "student-t":
            ours = stats.t.logpdf(x, shape[i], loc[i], scale[i]).sum()
            ref = stats.t.fit(x, shape[i], loc=loc[i], scale=scale[i])  # source: scipy.stats t.fit (Nelder-Mead)
            best = stats.t.logpdf(x, *ref).sum()
            if STUDENT_T_DF_BOUNDS[0] < ref[0] < STUDENT_T_DF_BOUNDS[1]:
                assert ours >= best - 1e-9 * abs(best)
        else:
            ours = stats.logistic.logpdf(x, loc[i], scale[i]).sum()
            best = stats.logistic.logpdf(x, *stats.logistic.fit(x, loc=loc[i], scale=scale[i])).sum()  # source: scipy
            assert ours >= best - 1e-9 * abs(best)


def _newton_ascent_before_reuse(loglik, data, theta0, lower, upper):
    """core/noise.py's ``_newton_ascent`` as it was before the line search's first trial kept its
    derivatives: every iteration evaluated them afresh and each trial point only its value."""
    from fitaudit.core import noise as nm

    theta = theta0.copy()
    n = data.shape[1]
    converged = np.zeros(len(theta), dtype=bool)
    todo = np.arange(len(theta))
    eye = np.eye(theta.shape[1], dtype=bool)
    y = data
    for _ in range(nm._NEWTON_MAX_ITER):
        if todo.size == 0:
            break
        th = theta[todo]
        ll, grad, hess = loglik(th, y, True)
        frozen = ((th <= lower) & (grad < 0)) | ((th >= upper) & (grad > 0))
        grad = np.where(frozen, 0.0, grad)
        coupled = ~(frozen[:, :, None] | frozen[:, None, :])
        curvature = np.where(coupled, -hess, np.where(eye, 1.0, 0.0))
        evals, evecs = np.linalg.eigh(curvature)
        evals = np.abs(evals)
        evals = np.maximum(evals, 1e-8 * evals.max(axis=1, keepdims=True) + 1e-12)
        coef = np.einsum("rji,rj->ri", evecs, grad) / evals
        direction = np.einsum("rij,rj->ri", evecs, coef)
        decrement = np.einsum("ri,ri->r", grad, direction)
        flat = decrement <= nm._NEWTON_DECREMENT_TOL * n
        new_th = th.copy()
        step = np.ones(len(todo))
        pending = ~flat
        for _ in range(nm._MAX_HALVINGS):
            idx = np.flatnonzero(pending)
            if idx.size == 0:
                break
            cand = np.clip(th[idx] + step[idx, None] * direction[idx], lower, upper)
            with np.errstate(all="ignore"):
                ll_cand = loglik(cand, y if idx.size == len(y) else y[idx], False)
            ok = ll_cand >= ll[idx] + nm._ARMIJO * step[idx] * decrement[idx]
            new_th[idx[ok]] = cand[ok]
            pending[idx[ok]] = False
            step[idx[~ok]] *= 0.5
        moved = np.max(np.abs(new_th - th), axis=1)
        small_step = ~pending & (moved <= nm._NEWTON_STEP_TOL)
        stalled = pending
        theta[todo] = new_th
        done = small_step | stalled | flat
        converged[todo[small_step | flat]] = True
        converged[todo[stalled & (decrement <= 1e-6 * n)]] = True
        if done.any():
            todo, y = todo[~done], y[~done]
    return theta, converged


@pytest.mark.parametrize("location", [True, False])
@pytest.mark.parametrize("name,shape", [("student-t", None), ("student-t", 5.0), ("logistic", None)])
def test_newton_reusing_the_first_trial_derivatives_is_bit_identical(monkeypatch, name, shape, location):
    """Keeping the line search's first trial derivatives for the next iteration changes no bit of
    any fit (rows from light to heavy tails, at the shape bounds, with outliers and a short row
    block, which halve steps and stop at different iterations)."""
    import fitaudit.core.noise as noise_module

    rng = np.random.default_rng(41)
    X = np.concatenate(
        [
            rng.standard_t(2.5, (40, 300)),
            rng.standard_t(7.0, (40, 300)),
            rng.standard_normal((40, 300)),  # t shape at its upper bound
            rng.logistic(size=(40, 300)),
            rng.standard_cauchy((8, 300)),  # t shape at its lower bound
            rng.standard_normal((8, 300)) + np.where(rng.uniform(size=(8, 300)) < 0.02, 25.0, 0.0),
        ]
    )
    law = get_law(name, shape)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        ours = law.fit_batch(X, location)
        monkeypatch.setattr(noise_module, "_newton_ascent", _newton_ascent_before_reuse)
        before = law.fit_batch(X, location)
    for new, old in zip(ours, before):
        if old is None:
            assert new is None
        else:
            np.testing.assert_array_equal(new, old)


def test_iteration_budget_exhausted_warns(monkeypatch):
    import fitaudit.core.noise as noise_module

    monkeypatch.setattr(noise_module, "_NEWTON_MAX_ITER", 1)
    x = np.random.default_rng(17).standard_t(4, size=200)
    with pytest.warns(ConvergenceWarning, match="did not converge for 1 of 1 series"):
        get_law("student-t").fit(x)


@pytest.mark.parametrize("location", [True, False])
@pytest.mark.parametrize(
    "name,shape", [("normal", None), ("laplace", None), ("logistic", None), ("student-t", None), ("student-t", 7.0)]
)
def test_fit_batch_equals_fit_row_by_row(name, shape, location):
    rng = np.random.default_rng(13)
    X = 2.0 + 3.0 * rng.standard_t(4, size=(12, 60))
    law = get_law(name, shape)
    loc, scale, shp = law.fit_batch(X, location)
    for r in range(len(X)):
        p = law.fit(X[r], location)
        assert (p.loc, p.scale) == (loc[r], scale[r])
        assert p.shape == (None if shp is None else shp[r])


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    a=st.floats(0.01, 100.0),
    b=st.floats(-50.0, 50.0),
    name=st.sampled_from(CONTINUOUS),
)
def test_fit_is_location_scale_equivariant(seed, a, b, name):
    # source: ML estimators of a location-scale family are equivariant (property of the likelihood)
    x = np.random.default_rng(seed).standard_t(6, size=40)
    law = get_law(name)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        p = law.fit(x)
        q = law.fit(a * x + b)
    assert q.loc == pytest.approx(a * p.loc + b, abs=1e-7 * a * p.scale)
    assert q.scale == pytest.approx(a * p.scale, rel=1e-7)
    if law.has_shape:
        # the likelihood is nearly flat in df when df is large (df ~ 50 from 40 points), so the
        # iteration's stopping rule leaves relative differences of order 1e-6 there
        assert q.shape == pytest.approx(p.shape, rel=1e-5)


# --------------------------------------------------------------------------------------------
# Fisher information and cell derivatives
# --------------------------------------------------------------------------------------------
def _expected_loglik(params: NoiseParams, thetas: np.ndarray) -> np.ndarray:
    """E_params[log f(X; theta)] for every row theta = (loc, scale[, shape]) of thetas, by quadrature."""
    true = scipy_frozen(params)
    dist = SCIPY[params.law]
    args = (thetas[:, 2],) if thetas.shape[1] == 3 else ()
    lo, hi = true.ppf(1e-15), true.ppf(1 - 1e-15)
    kinks = sorted({params.loc, *thetas[:, 0]})

    def integrand(x):
        return true.pdf(x) * dist.logpdf(x, *args, loc=thetas[:, 0], scale=thetas[:, 1])

    val, _ = integrate.quad_vec(integrand, lo, hi, points=kinks, limit=2000, epsabs=1e-13, epsrel=1e-13)
    return val


@pytest.mark.parametrize("name", CONTINUOUS)
def test_fisher_information_matches_numerical_second_derivatives(name):
    # source: numerical Hessian of the expected log-likelihood E[log f(X; theta)] (scipy.stats logpdf,
    # scipy.integrate.quad_vec); J = -d2/dtheta2 at the truth (information identity)
    params = all_params(name, loc=0.3, scale=1.4, df=5.0)
    theta0 = np.array([params.loc, params.scale] + ([params.shape] if params.shape is not None else []))
    k = len(theta0)
    h = 1e-3 * np.array([1.0, 1.0, 10.0])[:k]
    steps = np.diag(h)
    # central second differences: theta0 and theta0 +- e_i (+- e_j)
    pairs = [(i, j) for i in range(k) for j in range(i, k)]
    points = [theta0]
    for i, j in pairs:
        if i == j:
            points += [theta0 + steps[i], theta0 - steps[i]]
        else:
            points += [
                theta0 + steps[i] + steps[j],
                theta0 + steps[i] - steps[j],
                theta0 - steps[i] + steps[j],
                theta0 - steps[i] - steps[j],
            ]
    values = iter(_expected_loglik(params, np.array(points)))
    f0 = next(values)
    num = np.zeros((k, k))
    for i, j in pairs:
        if i == j:
            d2 = (next(values) - 2 * f0 + next(values)) / h[i] ** 2
        else:
            pp, pm, mp, mm = (next(values) for _ in range(4))
            d2 = (pp - pm - mp + mm) / (4 * h[i] * h[j])
        num[i, j] = num[j, i] = -d2
    J = get_law(name).fisher_information(params)
    # for the Laplace, E|X - loc'| has a |loc' - loc|^3 term, so the central difference is O(h) accurate
    tol = 5e-4 if name == "laplace" else 2e-5
    np.testing.assert_allclose(J, num, atol=tol * np.abs(J).max())


def test_fisher_information_normal_table():
    # source: docs/method.md §5.3 (normal (mu, sigma): J = diag(1, 2) / sigma^2)
    p = NoiseParams("normal", 1.0, 2.0, None, ("loc", "scale"))
    np.testing.assert_allclose(get_law("normal").fisher_information(p), np.diag([1.0, 2.0]) / 4.0, rtol=1e-15)
    only_scale = NoiseParams("normal", 0.0, 2.0, None, ("scale",))
    np.testing.assert_allclose(get_law("normal").fisher_information(only_scale), [[0.5]], rtol=1e-15)


def test_grouped_information_normal_ten_cells():
    # source: docs/method.md §5.3 table (J* = diag(0.959, 1.405) / sigma^2 for 10 equiprobable normal cells)
    sigma = 1.7
    p = NoiseParams("normal", -0.4, sigma, None, ("loc", "scale"))
    B = get_law("normal").cell_probability_gradient(10, p) / math.sqrt(0.1)
    Jstar = B.T @ B * sigma**2
    np.testing.assert_allclose(np.diag(Jstar), [0.959, 1.405], atol=5e-4)
    assert abs(Jstar[0, 1]) < 1e-12


@pytest.mark.parametrize(
    "s,lam_mu,lam_sigma",
    # source: docs/method.md §5.3 table (Chernoff-Lehmann lambdas, normal, equiprobable cells)
    [
        (4, 0.1394, 0.6325),
        (5, 0.1030, 0.5317),
        (6, 0.0806, 0.4588),
        (8, 0.0550, 0.3606),
        (10, 0.0410, 0.2975),
        (15, 0.0242, 0.2077),
        (20, 0.0167, 0.1600),
        (30, 0.0100, 0.1101),
    ],
)
def test_chernoff_lehmann_lambdas(s, lam_mu, lam_sigma):
    p = NoiseParams("normal", 0.0, 3.0, None, ("loc", "scale"))
    law = get_law("normal")
    B = law.cell_probability_gradient(s, p) / math.sqrt(1.0 / s)
    lam = 1.0 - np.linalg.eigvals(np.linalg.solve(law.fisher_information(p), B.T @ B))
    np.testing.assert_allclose(np.sort(lam.real), [lam_mu, lam_sigma], atol=5e-5)


@pytest.mark.parametrize("s", [2, 7, 12])
@pytest.mark.parametrize("name", CONTINUOUS)
def test_cell_probability_gradient_matches_finite_differences(name, s):
    # source: central differences of scipy.stats cdf at fixed cell boundaries
    params = all_params(name, loc=-0.2, scale=0.8, df=6.0)
    law = get_law(name)
    G = law.cell_probability_gradient(s, params)
    bounds = scipy_frozen(params).ppf(np.arange(1, s) / s)
    theta0 = np.array([params.loc, params.scale] + ([params.shape] if params.shape is not None else []))
    num = np.zeros_like(G)
    for i in range(len(theta0)):
        h = 1e-6 * max(1.0, abs(theta0[i]))
        cdfs = []
        for sign in (1, -1):
            th = theta0.copy()
            th[i] += sign * h
            alt = scipy_frozen(NoiseParams(name, th[0], th[1], th[2] if len(th) == 3 else None))
            cdfs.append(np.concatenate([[0.0], alt.cdf(bounds), [1.0]]))
        num[:, i] = np.diff(cdfs[0] - cdfs[1]) / (2 * h)
    # the Laplace density has a kink at loc, so differences across it are accurate to O(h) only
    np.testing.assert_allclose(G, num, atol=1e-6 if name == "laplace" else 1e-8)
    np.testing.assert_allclose(G.sum(axis=0), 0.0, atol=1e-14)


def test_gradient_columns_follow_estimated_order():
    law = get_law("student-t")
    full = law.cell_probability_gradient(6, NoiseParams("student-t", 0.0, 1.0, 5.0, ("loc", "scale", "shape")))
    part = law.cell_probability_gradient(6, NoiseParams("student-t", 0.0, 1.0, 5.0, ("scale", "shape")))
    np.testing.assert_array_equal(part, full[:, 1:])
    info = law.fisher_information(NoiseParams("student-t", 0.0, 1.0, 5.0, ("scale", "shape")))
    assert info.shape == (2, 2)


# --------------------------------------------------------------------------------------------
# Count laws
# --------------------------------------------------------------------------------------------
def _count_data(rng, n=400, size=2.5):
    mean = rng.uniform(1.0, 8.0, size=n)
    y = rng.negative_binomial(size, size / (size + mean)).astype(float)
    return y, mean


def test_count_logpmf_matches_scipy(rng):
    y, mean = _count_data(rng, n=50)
    nb = NoiseParams("negative-binomial", 0.0, 1.0, 2.5)
    ours = get_law("negative-binomial").logpmf(y, mean, nb)
    np.testing.assert_allclose(
        ours, stats.nbinom.logpmf(y, 2.5, 2.5 / (2.5 + mean)), rtol=1e-12
    )  # source: scipy.stats.nbinom
    pois = NoiseParams("poisson", 0.0, 1.0, None)
    np.testing.assert_allclose(
        get_law("poisson").logpmf(y, mean, pois), stats.poisson.logpmf(y, mean), rtol=1e-12
    )  # source: scipy.stats.poisson


def test_negative_binomial_size_ml_matches_scipy_optimize(rng):
    y, mean = _count_data(rng)
    ours = get_law("negative-binomial").fit_counts(y, mean)

    def negloglik(log_r):
        r = np.exp(log_r)
        return -stats.nbinom.logpmf(y, r, r / (r + mean)).sum()

    # source: scipy.optimize.minimize_scalar on scipy.stats.nbinom.logpmf
    ref = optimize.minimize_scalar(negloglik, bounds=np.log(NB_SIZE_BOUNDS), method="bounded", options={"xatol": 1e-12})
    assert ours.shape == pytest.approx(np.exp(ref.x), rel=1e-7)
    assert ours.estimated == ("shape",)
    assert get_law("negative-binomial", shape=3.0).fit_counts(y, mean).shape == 3.0
    assert get_law("poisson").fit_counts(y, mean).estimated == ()


def test_negative_binomial_without_overdispersion_hits_the_bounds():
    # counts equal to their means show no extra-Poisson variation: the likelihood increases in the
    # size without bound (score > 0, Anscombe 1950, from memory), so the estimate is the cap
    y = np.array([1.0, 2.0, 3.0, 1.0, 4.0, 2.0])
    assert get_law("negative-binomial").fit_counts(y, y).shape == NB_SIZE_BOUNDS[1]
    # all-zero counts with positive means: the likelihood increases as the size falls (score < 0)
    assert get_law("negative-binomial").fit_counts(np.zeros(6), 2.0).shape == NB_SIZE_BOUNDS[0]


def test_fit_counts_batch_equals_fit_counts(rng):
    law = get_law("negative-binomial")
    Y = np.stack([_count_data(rng, n=80)[0] for _ in range(5)])
    mean = np.linspace(1.0, 8.0, 80)
    sizes = law.fit_counts_batch(Y, mean)
    for r in range(5):
        assert law.fit_counts(Y[r], mean).shape == sizes[r]


@pytest.mark.parametrize("name", COUNT)
def test_randomized_pit_lies_in_its_interval(name, rng):
    y, mean = _count_data(rng, n=200)
    params = NoiseParams(name, 0.0, 1.0, 2.5 if name == "negative-binomial" else None)
    u = get_law(name).randomized_pit(y, mean, params, rng)
    ref = stats.nbinom(2.5, 2.5 / (2.5 + mean)) if name == "negative-binomial" else stats.poisson(mean)
    # source: Dunn and Smyth (1996), docs/method.md §6.2: u_t in [F(y_t - 1), F(y_t)] computed with scipy.stats
    assert np.all(u >= ref.cdf(y - 1) - 1e-12) and np.all(u <= ref.cdf(y) + 1e-12)


@pytest.mark.parametrize("name", COUNT)
def test_randomized_pit_is_uniform_under_the_model(name):
    rng = np.random.default_rng(14)
    law = get_law(name)
    params = NoiseParams(name, 0.0, 1.0, 1.5 if name == "negative-binomial" else None)
    mean = rng.uniform(0.2, 6.0, size=5000)
    y = law.sample_counts(mean, rng, params)
    u = law.randomized_pit(y, mean, params, rng)
    # source: Dunn and Smyth (1996), docs/method.md §6.2 (exactly U(0,1) under H0);
    # scipy.stats.kstest, seeded, wide tolerance
    assert stats.kstest(u, "uniform").pvalue > 1e-3


def test_sample_counts_moments():
    rng = np.random.default_rng(15)
    mean = np.full(20000, 4.0)
    y = get_law("negative-binomial").sample_counts(mean, rng, NoiseParams("negative-binomial", 0.0, 1.0, 2.0))
    # source: NB2 variance mu + mu^2 / r = 4 + 8 = 12 (Cameron & Trivedi, from memory); scipy.stats.nbinom.var agrees
    assert stats.nbinom(2.0, 2.0 / 6.0).var() == pytest.approx(12.0)
    assert y.mean() == pytest.approx(4.0, rel=0.03)
    assert y.var() == pytest.approx(12.0, rel=0.06)


def test_count_input_errors(rng):
    law = get_law("poisson")
    params = NoiseParams("poisson", 0.0, 1.0, None)
    with pytest.raises(InputError, match="non-negative integers"):
        law.randomized_pit([1.5, 2.0], [1.0, 1.0], params, rng)
    with pytest.raises(InputError, match="positive"):
        law.randomized_pit([1, 2], [1.0, 0.0], params, rng)
    with pytest.raises(InputError, match="Generator"):
        law.randomized_pit([1, 2], [1.0, 1.0], params, 42)
