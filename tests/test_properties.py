"""Property tests: random registries, count vectors, grids and series never crash or give NaN.

Extends tests/test_registry.py (random token soups, random YAML trees and line mutations of a
valid document, which mostly stop at registry-level checks) with random *model entries* inside a
valid document, so that every field validator and the spec constructors see random values, and
with random bytes read from a file.  Extends tests/test_divergence.py (counts up to 500, uniform
cells) with extreme counts, very unequal cell probabilities and wide grids.  The audit-level
property feeds random finite series (with random specs, noise laws, production parameters and
windows) through ``audit_series``: it never raises and always gives a valid verdict with a reason.
"""

from __future__ import annotations

import json
import math
import re

import numpy as np
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from fitaudit.core.audit import AuditSettings, audit_series
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.divergence import SCALINGS, divergence_map
from fitaudit.core.models import model_from_dict
from fitaudit.core.noise import NOISE_LAWS, get_law
from fitaudit.core.vocabulary import ADJUDICATED_VERDICTS, VERDICTS
from fitaudit.tasks._io import canonical_json
from fitaudit.tasks.registry import (
    MAX_ID_LENGTH,
    SAFE_ID,
    Registry,
    RegistryError,
    check_registry,
    load_registry,
    parse_registry,
)

# ------------------------------------------------------------------------------------------
# registry: random model entries in a valid document
# ------------------------------------------------------------------------------------------
HEAD = {
    "version": 1,
    "policy": {"justification": "fixed before the run", "approved_by": "T. Approver, tests"},
    "sources": {
        "main": {
            "uri": "data/main.parquet",
            "key": "series",
            "time": "date",
            "value": "y",
            "exogenous": ["x", "z"],
            "frequency": "D",
        }
    },
}
_junk = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**12), 10**12),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=20),
    st.lists(st.integers(-3, 9), max_size=5),
    st.dictionaries(st.text(max_size=5), st.integers(), max_size=3),
)
_names = st.one_of(
    st.sampled_from(
        [
            "m1",
            "M1",
            "m-2",
            "a" * MAX_ID_LENGTH,
            "a" * (MAX_ID_LENGTH + 1),
            "../x",
            "<b>",
            "x\u202e",
            "a\x00b",
            ".h",
            "",
        ]
    ),
    st.text(min_size=1, max_size=12),
    _junk,
)
_orders = st.one_of(st.lists(st.integers(-1, 4), min_size=0, max_size=5), _junk)
_specs = st.fixed_dictionaries(
    {"family": st.one_of(st.sampled_from(["arima", "smoothing", "nonlinear-ar", "prophet"]), _junk)},
    optional={
        "order": _orders,
        "seasonal": _orders,
        "trend": st.one_of(st.sampled_from(["n", "c", "t", "ct", "add", "mul", None]), _junk),
        "damped": st.one_of(st.booleans(), _junk),
        "period": st.one_of(st.integers(-2, 400), _junk),
        "function": st.one_of(st.sampled_from(["setar", "pkg.mod:f", "no colon", "a:b:c"]), _junk),
        "lags": _orders,
        "start": st.one_of(
            st.dictionaries(st.sampled_from(["a", "b", "c"]), st.floats(allow_nan=True), max_size=3), _junk
        ),
        "delay": _junk,
        "trim": st.one_of(st.floats(-1, 1), _junk),
        "maxiter": _junk,
        "method": st.one_of(st.sampled_from(["exact", "css"]), _junk),
        "ordr": _junk,
    },
)
_noise = st.one_of(
    st.sampled_from([*NOISE_LAWS, "gaussian"]),
    _junk,
    st.fixed_dictionaries(
        {"law": st.sampled_from([*NOISE_LAWS, "cauchy"])}, optional={"df": _junk, "size": _junk, "shape": _junk}
    ),
)
_windows = st.one_of(
    st.fixed_dictionaries(
        {},
        optional={
            "fit": st.one_of(st.integers(-5, 10**6), _junk),
            "audit": st.one_of(st.integers(-5, 400), _junk),
            "tail": _junk,
        },
    ),
    _junk,
)
_entries = st.fixed_dictionaries(
    {},
    optional={
        "id": _names,
        "owner": _names,
        "tier": st.one_of(st.integers(0, 4), _junk),
        "description": _junk,
        "source": st.one_of(st.sampled_from(["main", "nowhere"]), _junk),
        "series": _names,
        "value": st.one_of(st.sampled_from(["y", "x", "series", "date"]), _junk),
        "exogenous": st.one_of(st.lists(st.sampled_from(["x", "z", "y", "w"]), max_size=3), _junk),
        "spec": st.one_of(_specs, _junk),
        "noise": _noise,
        "windows": _windows,
        "settings": st.one_of(
            st.fixed_dictionaries(
                {}, optional={"level": _junk, "calibration": _junk, "replicates": _junk, "seed": _junk}
            ),
            _junk,
        ),
        "last_validated": st.one_of(st.dates().map(str), _junk),
        "colour": _junk,
    },
)


@settings(max_examples=250, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(_entries, max_size=6))
def test_random_model_entries_are_accepted_or_rejected_never_crash(entries):
    text = yaml.safe_dump({**HEAD, "models": entries}, allow_unicode=True, sort_keys=False)
    reg = parse_registry(text, "registry.yaml")  # the head is valid: entry problems never stop the run
    assert isinstance(reg, Registry) and len(reg.models) + len(reg.rejected) == len(entries)
    for m in reg.models:
        assert SAFE_ID.match(m.id) and len(m.id) <= MAX_ID_LENGTH
        model_from_dict(m.spec)  # an accepted spec builds
        get_law(m.noise.law, shape=m.noise.shape)
        assert m.fit_window >= m.audit_window >= 1 and m.source == "main"
    safe = [m.id for m in reg.models] + [r.safe_id for r in reg.rejected]
    assert all(SAFE_ID.match(s) for s in safe) and len({s.casefold() for s in safe}) == len(safe)
    lines = len(re.split("\r\n|[\n\r\x85\u2028\u2029]", text))  # YAML's line breaks (PyYAML counts NEL, LS, PS too)
    for r in reg.rejected:
        assert r.problems and all(
            p.field.startswith("models[") and 1 <= p.line <= lines and p.message for p in r.problems
        )
    canonical_json(reg.to_dict())


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=400), st.sampled_from([b"", b"\xef\xbb\xbf", b"version: 1\n", b"\x00"]))
def test_random_bytes_in_a_registry_file_give_a_clean_answer(tmp_path_factory, data, prefix):
    path = tmp_path_factory.mktemp("bytes") / "registry.yaml"
    path.write_bytes(prefix + data)
    try:
        reg = load_registry(path)
    except RegistryError as exc:
        assert exc.problems and all(p.message for p in exc.problems)
    else:
        canonical_json(reg.to_dict())
    assert all(p.message for p in check_registry(path))


# ------------------------------------------------------------------------------------------
# divergence map: extreme counts, unequal cells, wide grids
# ------------------------------------------------------------------------------------------
_counts = st.lists(st.one_of(st.just(0), st.integers(0, 3), st.integers(0, 10**12)), min_size=2, max_size=16).filter(
    lambda c: sum(c) > 0
)
_weights = st.lists(st.floats(1e-12, 1.0), min_size=16, max_size=16)
_scalings = st.sampled_from(
    [(s, None) for s in SCALINGS if s != "power"] + [("power", r) for r in (-2.0, -1.0, 0.5, 1.0, 3.0)]
)


@settings(max_examples=200, deadline=None)
@given(
    counts=_counts,
    weights=_weights,
    sr=_scalings,
    alphas=st.lists(st.floats(-8, 8, allow_nan=False), min_size=1, max_size=5),
    betas=st.lists(st.floats(0, 1), min_size=1, max_size=4),
)
def test_extreme_counts_and_grids_never_give_nan(counts, weights, sr, alphas, betas):
    w = np.asarray(weights[: len(counts)])
    probs = w / w.sum()
    m = divergence_map(counts, probs, alphas, betas, *sr)
    assert not np.isnan(m.statistic).any()
    assert (m.statistic >= 0).all()
    assert np.array_equal(m.infinite, np.isinf(m.statistic))
    assert not np.isnan(m.t_max)


# ------------------------------------------------------------------------------------------
# audit_series: random finite series never raise and always get a verdict
# ------------------------------------------------------------------------------------------
SPECS = [
    {"family": "arima", "order": [1, 0, 0], "trend": "c"},
    {"family": "arima", "order": [0, 1, 1], "trend": "n"},
    {"family": "arima", "order": [1, 0, 1], "seasonal": [0, 1, 1, 7], "trend": "n"},
    {"family": "smoothing", "trend": "add", "damped": True},
    {"family": "smoothing", "seasonal": "mul", "period": 4},
    {"family": "nonlinear-ar", "function": "setar", "lags": [1]},
]
_CACHE = CalibrationCache()


def _series(kind: str, n: int, seed: int, exponent: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    if kind == "integers":
        y = rng.poisson(3.0, n).astype(float)
    elif kind == "ties":
        y = rng.choice([1.0, 2.0, 2.0, 5.0], n)
    elif kind == "spike":
        y = rng.normal(0, 1, n)
        y[rng.integers(n)] = 1e6
    elif kind == "walk":
        y = np.cumsum(rng.normal(0, 1, n))
    elif kind == "cauchy":
        y = rng.standard_cauchy(n)
    else:
        y = rng.normal(0, 1, n)
    return y * 10.0**exponent


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    kind=st.sampled_from(["normal", "integers", "ties", "spike", "walk", "cauchy"]),
    n=st.one_of(st.integers(2, 30), st.integers(60, 160)),
    seed=st.integers(0, 2**32 - 1),
    exponent=st.sampled_from([0, 0, 0, 3, -3, 160, -160, 300]),
    spec=st.sampled_from(SPECS),
    law=st.sampled_from(sorted(NOISE_LAWS)),
    production=st.one_of(st.none(), st.floats(-3, 3, allow_nan=False)),
    window=st.integers(1, 60),
    calibration=st.sampled_from(["asymptotic", "simulated"]),
)
def test_random_finite_series_always_get_a_verdict(kind, n, seed, exponent, spec, law, production, window, calibration):
    y = _series(kind, n, seed, exponent)
    assert np.isfinite(y).all()
    model = model_from_dict(spec)
    params = None
    if production is not None:  # a production version with every parameter of the spec (possibly non-stationary)
        params = {name: production for name in model.param_names()}
        params["sigma2"] = abs(production) + 0.1
    settings_ = AuditSettings(
        calibration=calibration, replicates=99, change_permutations=19, audit_window=window, seed=seed % 1000
    )
    result = audit_series(y, spec, noise=law, production=params, settings=settings_, cache=_CACHE, label="model 'prop'")
    assert result.verdict in VERDICTS
    assert result.reasons and all(isinstance(r, str) and r.strip() for r in result.reasons)
    assert not any(re.search(r"(?<![\w'-])nan(?![\w'-])", r) for r in result.reasons), result.reasons
    if result.verdict in ADJUDICATED_VERDICTS:
        check = result.deciding_check
        assert check.ok and math.isfinite(check.p_value) and 0.0 <= check.p_value <= 1.0
    canonical_json(result.to_dict())


# ------------------------------------------------------------------------------------------
# canonical JSON: the shortcut for parsed JSON writes the same bytes
# ------------------------------------------------------------------------------------------
_json_values = st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=6), inner, max_size=4),
    max_leaves=20,
)


@settings(max_examples=300, deadline=None)
@given(value=_json_values, indent=st.sampled_from([None, 2]))
def test_canonical_json_of_parsed_json_skips_nothing_that_matters(value, indent):
    """``canonical_json(..., str_keys=True)`` (the chain check's shortcut) equals the full conversion,
    non-finite floats (which ``json.loads`` accepts as NaN and Infinity) included."""
    parsed = json.loads(json.dumps(value))
    assert canonical_json(parsed, indent, str_keys=True) == canonical_json(parsed, indent)
