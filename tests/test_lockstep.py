"""Audits run side by side (core/lockstep.py) give each audit the result it gets alone.

The checks pause for their cell counts, divergence map and gate statistics, and
:func:`~fitaudit.core.lockstep.lockstep` computes those of many checks in one call.  Every result
must be bit for bit the one of the audit alone, whatever else is in the batch (the determinism
promise of docs/architecture.md: results do not depend on the batch size), failures must stay
with their model, and a model's timings must count its own work only.
"""

from __future__ import annotations

import pathlib
import pickle
import time

import numpy as np
import pytest

from fitaudit.core.audit import audit_series, audit_series_steps
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.cells import cell_counts, number_of_cells
from fitaudit.core.diagnostics import acf, autocovariances, ljung_box, mcleod_li, square_autocovariances
from fitaudit.core.divergence import divergence_map, row_block
from fitaudit.core.lockstep import MapAndGate, MapRequest, lockstep, map_and_gate, run_steps
from fitaudit.core.settings import AuditSettings

FAST = AuditSettings(replicates=199, audit_window=60, change_permutations=99, seed=3)
AR1 = {"family": "arima", "order": [1, 0, 0], "trend": "c"}
TRUE = {"ar1": 0.6, "intercept": 10.0, "sigma2": 1.0}


def _without_timings(result) -> bytes:
    data = result.to_dict()
    data.pop("timings", None)
    return pickle.dumps(data)


def _ar1(rng, n: int, df: float | None = None, shift: float = 0.0) -> np.ndarray:
    e = rng.standard_normal(n) if df is None else rng.standard_t(df, n)
    y = np.empty(n)
    y[0] = 25.0
    for t in range(1, n):
        y[t] = 10.0 + 0.6 * y[t - 1] + e[t]
    y[-40:] += shift
    return y


@pytest.mark.parametrize("n, k", [(730, 2), (723, 3), (100, 1), (52, 0)])
def test_rows_of_a_block_are_scored_as_each_row_alone(n, k):
    """The map and the gate of ``row_block`` rows at once equal those of each row alone, bit for bit,
    with empty cells and PIT values at the edges among them."""
    settings = AuditSettings()
    s, gate = number_of_cells(n, k), settings.gate(n, k)
    rows = row_block(max(s, sum(p.s for p in gate.partitions)))
    rng = np.random.default_rng(n)
    u = rng.random((rows, n)) ** rng.uniform(0.6, 1.6, size=(rows, 1))  # some far from uniform
    u[0, :] = 0.5  # one cell holds everything, the others are empty
    u[1, :5] = [0.0, 1.0, 1e-12, 1.0 - 1e-12, 0.5]
    probs = np.full(s, 1.0 / s)
    together = divergence_map(cell_counts(u, s), probs, settings.alphas, settings.betas, settings.scaling)
    gate_together = gate.statistics(u)
    for i in range(rows):
        alone = divergence_map(cell_counts(u[i], s), probs, settings.alphas, settings.betas, settings.scaling)
        assert pickle.dumps(alone) == pickle.dumps(together.row(i))
        assert np.array_equal(gate.statistics(u[i]), gate_together[i], equal_nan=True)


def test_independence_statistics_from_a_batchs_autocovariances_equal_those_of_each_series_alone():
    """Ljung-Box, McLeod-Li and the autocorrelations read from autocovariances computed for many
    series at once, with more lags than they use, equal the functions' own computation."""
    rng = np.random.default_rng(15)
    errors = rng.standard_t(4, size=(40, 723)) * rng.uniform(0.01, 100.0, size=(40, 1))
    cov, cov_sq = autocovariances(errors, 20), square_autocovariances(errors, 20)
    for i, e in enumerate(errors):
        assert pickle.dumps(ljung_box(e, 14, 3, given=cov[i])) == pickle.dumps(ljung_box(e, 14, 3))
        assert pickle.dumps(mcleod_li(e, 14, given=cov_sq[i])) == pickle.dumps(mcleod_li(e, 14))
        assert np.array_equal(acf(e, 20, given=cov[i]), acf(e, 20))
    # source: statsmodels acorr_ljungbox (general-purpose reference library), same convention
    from statsmodels.stats.diagnostic import acorr_ljungbox

    theirs = acorr_ljungbox(errors[0], lags=[14], model_df=3)
    assert ljung_box(errors[0], 14, 3, given=cov[0]).statistic == pytest.approx(float(theirs["lb_stat"].iloc[0]))


def test_a_request_that_cannot_be_scored_gets_its_exception_and_the_others_their_answers():
    settings = AuditSettings()
    gate = settings.gate(100, 1)
    good = np.linspace(0.005, 0.995, 100)
    bad = good.copy()
    bad[3] = np.nan
    requests = [
        MapRequest(x, 13, gate, settings.alphas, settings.betas, settings.scaling, settings.r)
        for x in (good, bad, good[::-1].copy())
    ]
    answers = map_and_gate(requests)
    assert isinstance(answers[1], ValueError) and "NaN" in str(answers[1])  # InputError is a ValueError
    alone = map_and_gate(requests[:1])[0]
    for answer in (answers[0], answers[2]):
        assert isinstance(answer, MapAndGate)
        assert pickle.dumps(answer.map) == pickle.dumps(alone.map)
        assert np.array_equal(answer.counts, alone.counts)


def test_audits_side_by_side_equal_each_audit_alone():
    """A mixed batch: production and refit checks, another noise law, other window lengths (other
    groups of requests), a series too short, one with a gap: every result as alone."""
    rng = np.random.default_rng(11)
    cases = [dict(y=_ar1(rng, 400), spec=AR1, production=TRUE) for _ in range(6)]
    cases += [dict(y=_ar1(rng, 400, shift=3.0), spec=AR1, production=TRUE)]  # a level shift: refit, located
    cases += [dict(y=_ar1(rng, 400, df=3), spec=AR1, noise="student-t", production=TRUE | {"df": 5.0})]
    cases += [dict(y=_ar1(rng, 300), spec={"family": "arima", "order": [1, 1, 1]})]  # refit only, n = 299
    cases += [dict(y=_ar1(rng, 30), spec=AR1, production=TRUE)]  # too short
    gap = _ar1(rng, 400)
    gap[100] = np.nan
    cases += [dict(y=gap, spec=AR1, production=TRUE)]  # an error
    cache = CalibrationCache()
    alone = [audit_series(settings=FAST, cache=cache, label=f"m{i}", **c) for i, c in enumerate(cases)]
    together = lockstep(
        [audit_series_steps(settings=FAST, cache=cache, label=f"m{i}", **c) for i, c in enumerate(cases)]
    )
    assert [r.verdict for r in together] == [r.verdict for r in alone]
    assert {r.verdict for r in alone} >= {"pass", "refit", "insufficient", "error"}
    assert alone[6].change is not None  # the located change went through the side-by-side run too
    assert [_without_timings(r) for r in together] == [_without_timings(r) for r in alone]
    # the public single-audit path is the same steps run alone
    assert _without_timings(run_steps(audit_series_steps(settings=FAST, cache=cache, **cases[0]))) == (
        _without_timings(audit_series(settings=FAST, cache=cache, **cases[0]))
    )


def test_timings_count_each_audits_own_work_not_its_waits():
    """Side by side, each audit waits while the others work; its timings leave the waits out, so
    the audits' times add up to no more than the whole run (with the waits in, 20 audits' times
    would add up to many times it)."""
    rng = np.random.default_rng(12)
    cache = CalibrationCache()
    cases = [_ar1(rng, 400) for _ in range(20)]
    audit_series(cases[0], AR1, production=TRUE, settings=FAST, cache=cache)  # the null tables, built once
    t0 = time.perf_counter()
    results = lockstep([audit_series_steps(y, AR1, production=TRUE, settings=FAST, cache=cache) for y in cases])
    wall = time.perf_counter() - t0
    totals = [r.timings["total_s"] for r in results]
    assert all(t > 0 for t in totals)
    assert sum(totals) <= wall
    for r in results:
        assert r.timings["production_s"] + r.timings["refit_s"] <= r.timings["total_s"]


def test_a_hook_that_contains_a_failure_ends_that_audit_only():
    """``resume`` may turn a failed stretch into its own result; the other audits go on."""
    rng = np.random.default_rng(13)
    cases = [_ar1(rng, 400) for _ in range(3)]
    cache = CalibrationCache()

    def resume(i, advance):
        if i == 1:
            return "contained"
        return advance()

    results = lockstep([audit_series_steps(y, AR1, settings=FAST, cache=cache) for y in cases], resume)
    assert results[1] == "contained"
    assert [_without_timings(results[i]) for i in (0, 2)] == [
        _without_timings(audit_series(cases[i], AR1, settings=FAST, cache=cache)) for i in (0, 2)
    ]


def test_the_audit_stage_keeps_a_failure_and_a_time_limit_with_their_model(tmp_path, monkeypatch):
    """``audit_inputs`` runs a batch side by side: a model whose audit raises mid-way (after its first
    request) and one whose mean function never returns get ``error`` outcomes naming them; the
    others get the outcomes they get alone."""
    import sys

    sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures, nlar_functions
    from fleet_fixtures import Fleet, ar1, days

    import fitaudit.tasks.audit.work as work
    from fitaudit.tasks.batchfiles import ModelInput
    from fitaudit.tasks.registry import load_registry
    from fitaudit.tasks.workers import can_limit_time

    if not can_limit_time():
        pytest.skip("the per-model time limit needs SIGALRM in the main thread")
    rng = np.random.default_rng(14)
    fleet = Fleet(tmp_path)
    fleet.source("main", "data/main.parquet")
    names = ["a", "boom", "b", "hangs", "c"]
    for name in names:
        spec = None
        if name == "hangs":
            start = {"c": 25.0, "a1": 0.4, "a2": 0.1}
            function = "nlar_functions:never_returns"
            spec = {"family": "nonlinear-ar", "function": function, "lags": [1, 2], "start": start}
        fleet.model(name, "main", name, spec=spec)
    registry = load_registry(fleet.write())
    series = {name: ar1(rng) for name in names}
    items = [
        ModelInput(entry=e, y=series[e.id], time=days(), exog={}, production=None, lineage={}, problems=(), history=())
        for e in registry.models
    ]
    real = work.audit_series_steps

    def boom_after_first_request(*args, label=None, **kwargs):
        steps = real(*args, label=label, **kwargs)
        if label != "model 'boom'":
            return (yield from steps)
        answer = yield next(steps)
        raise RuntimeError(f"broken after its first answer ({type(answer).__name__})")

    monkeypatch.setattr(work, "audit_series_steps", boom_after_first_request)
    cache = CalibrationCache()
    together = work.audit_inputs(items, registry.policy, cache, time_limit_s=2.0)
    alone = [work.audit_inputs([item], registry.policy, cache, time_limit_s=2.0)[0] for item in items]
    by_id = {o.model_id: o for o in together}
    boom, hangs = " ".join(by_id["boom"].reasons), " ".join(by_id["hangs"].reasons)
    assert by_id["boom"].verdict == "error" and "model 'boom'" in boom and "RuntimeError" in boom
    assert "broken after its first answer (MapAndGate)" in boom
    # source: the message contract of DEVELOPERS.md, "Nothing is lost" (names the model, the cause and the fix)
    assert by_id["hangs"].verdict == "error" and "model 'hangs'" in hangs and "time limit of 2 s per model" in hangs
    for o, a in zip(together, alone):
        assert o.verdict == a.verdict and o.reasons == a.reasons
        if o.result is not None:
            assert _without_timings(o.result) == _without_timings(a.result)
    assert {by_id[n].verdict for n in ("a", "b", "c")} <= {"pass", "refit", "respecify"}
