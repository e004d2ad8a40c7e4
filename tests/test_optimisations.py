"""The performance work (faster change location, worker processes, spill files, streaming) changes no result.

Each optimisation is checked against the unoptimised way of computing the same thing:

* change location: the O(n) permutation maxima against the one-hot split statistics (kept in
  ``fitaudit.core.change.split_statistics``) and scipy's G-test, and ``locate_change`` (also with the
  run's permutations made once) against the original permutation loop (kept below);
* the report's ``svg``, ``num_cells`` and ``map_cells`` filters against the Jinja macro and loops they
  replaced (kept below);
* the report's number format against its previous form (kept below), the rectangles' coordinate
  texts against ``coord``, and the JSON conversions' fast paths for lists of plain values against
  the element-by-element conversions;
* staging in several filtered scans against one scan per source;
* light outcomes restored after the fleet rules against the fleet rules on full outcomes;
* the whole audit flow (local worker processes, outcomes kept on disk, records and pages made per
  batch, ``results.json`` streamed) against the plain pipeline of the same functions in one
  process: byte-identical ``results.json``, pages and Parquet rows.
"""

from __future__ import annotations

import json
import os
import pathlib
import pickle
import shutil

import numpy as np
import pyarrow.parquet as pq
import pytest
from scipy import stats

from fitaudit.core.calibration import key_rng
from fitaudit.core.cells import cell_index, number_of_cells
from fitaudit.core.change import locate_change, permutation_maxima, split_statistics
from fitaudit.core.noise import get_law
from fitaudit.core.vocabulary import VERDICTS

#: The chart macro of templates/_charts.html.j2 before the ``svg`` filter replaced it (a heat map's
#: cells, whose rectangle text the chart builder now makes once per grid size, are written from that
#: text; tests/test_report.py checks their places and classes against the grid).
REFERENCE_SVG_MACRO = (
    "{% macro svg(c) %}\n"
    '<svg class="chart {{ c.cls }}" role="img" aria-labelledby="{{ c.id }}-t {{ c.id }}-d" '
    'viewBox="0 0 {{ c.w|px }} {{ c.h|px }}" width="{{ c.w|px }}" height="{{ c.h|px }}">\n'
    '<title id="{{ c.id }}-t">{{ c.title }}</title>\n'
    '<desc id="{{ c.id }}-d">{{ c.desc }}</desc>\n'
    '{% for l in c.grid %}<line x1="{{ l.x1|px }}" y1="{{ l.y1|px }}" x2="{{ l.x2|px }}" y2="{{ l.y2|px }}" '
    'class="{{ l.cls }}"/>{% endfor %}\n'
    "\n"
    '{% for r in c.rects %}<rect x="{{ r.x|px }}" y="{{ r.y|px }}" width="{{ r.w|px }}" height="{{ r.h|px }}" '
    'class="{{ r.cls }}"/>{% endfor %}'
    '{% for prefix, cls in c.get("cells", []) %}{{ prefix|safe }}{{ cls }}"/>{% endfor %}\n'
    "\n"
    '{% for l in c.lines %}<line x1="{{ l.x1|px }}" y1="{{ l.y1|px }}" x2="{{ l.x2|px }}" y2="{{ l.y2|px }}" '
    'class="{{ l.cls }}"/>{% endfor %}\n'
    "\n"
    '{% for p in c.polylines %}<polyline points="{{ p.points }}" class="{{ p.cls }}"/>{% endfor %}\n'
    "\n"
    '{% for p in c.paths %}<path d="{{ p.d }}" class="{{ p.cls }}"/>{% endfor %}\n'
    "\n"
    '{% for o in c.circles %}<circle cx="{{ o.cx|px }}" cy="{{ o.cy|px }}" r="{{ o.r|px }}" '
    'class="{{ o.cls }}"/>{% endfor %}\n'
    "\n"
    '{% for t in c.texts %}<text x="{{ t.x|px }}" y="{{ t.y|px }}" text-anchor="{{ t.anchor }}" '
    'class="{{ t.cls }}">{{ t.text }}</text>{% endfor %}\n'
    "\n"
    "</svg>\n"
    "{% endmacro %}"
)

#: The template loops of the data tables' rows before the ``num_rows`` and ``map_rows`` filters
#: replaced them (templates/model.html.j2; before that the cells too were a loop each), as macros the
#: filters' callers can take.
REFERENCE_ROW_MACROS = (
    '{% macro num_rows(rows, keys=none, head=none, head_class="n") %}{% for r in rows %}<tr>'
    '{% if head is not none %}<th scope="row"{% if head_class %} class="{{ head_class }}"{% endif %}>{{ r[head] }}'
    "</th>{% endif %}"
    '{% if keys is none %}{% for t in r %}<td class="n">{{ t }}</td>{% endfor %}'
    '{% else %}{% for k in keys %}<td class="n">{{ r[k] }}</td>{% endfor %}{% endif %}</tr>\n'
    "{% endfor %}{% endmacro %}"
    '{% macro map_rows(rows) %}{% for row in rows %}<tr><th scope="row" class="n">{{ row["alpha"] }}</th>'
    '{% for text, fail in row["cells"] %}<td class="n{% if fail %} fail{% endif %}">{{ text }}</td>{% endfor %}'
    "</tr>\n{% endfor %}{% endmacro %}"
)

#: Demo models covering four sources, every verdict, smoothing, threshold AR, a rejected entry and
#: forecasts made elsewhere (quantiles failing, a mean with a fixed scale passing).
DEMO_SUBSET = [
    "demand-d-02",
    "demand-d-03",
    "demand-d-07",
    "demand-d-11",
    "demand-d-13",
    "demand-d-19",
    "demand-d-22",
    "demand-d-25",
    "demand-d-31",
    "demand-d-32",
    "demand-d-40-legacy",
    "energy-pump-01",
    "energy-pump-02",
    "leakage-leak-01",
    "supplier-pump-02",
    "notebook-leak-01",
]


def _reference_locate_change(errors: np.ndarray, permutations: int, seed: int) -> tuple[int, float, float]:
    """locate_change before the O(n) rewrite: permutations scored by the one-hot split statistics, in chunks."""
    law = get_law("normal")
    e = errors[~np.isnan(errors)]
    n = e.size
    s = number_of_cells(n, 2)
    h = max(s, int(np.ceil(0.1 * n)))
    idx = cell_index(law.cdf(e, law.fit(e, location=True)), s)
    profile = split_statistics(idx, s, h)
    t_obs = float(profile.max())
    rng = key_rng(seed, "change", n, s)
    exceed, done, chunk = 0, 0, max(1, 2_000_000 // (n * s))
    while done < permutations:
        b = min(chunk, permutations - done)
        perm = np.argsort(rng.random((b, n)), axis=1)
        t_perm = np.atleast_2d(split_statistics(idx[perm], s, h)).max(axis=1)
        exceed += int(np.sum(t_perm >= t_obs - 1e-9 * max(1.0, abs(t_obs))))
        done += b
    return h + int(np.argmax(profile)), t_obs, (1 + exceed) / (permutations + 1)


def test_permutation_maxima_equal_the_g_test_maxima(rng):
    s, trim = 6, 8
    base = rng.integers(0, s, size=60)
    rows = np.stack([base] + [rng.permutation(base) for _ in range(4)])  # rows share their cell totals
    fast = permutation_maxima(rows, s, trim)
    for row, value in zip(rows, fast):
        g = []
        for k in range(trim, row.size - trim + 1):
            table = np.vstack([np.bincount(row[:k], minlength=s), np.bincount(row[k:], minlength=s)])
            keep = table.sum(axis=0) > 0
            # source: scipy.stats.chi2_contingency with lambda_="log-likelihood" (G-test of homogeneity of the two
            # sides)
            g.append(stats.chi2_contingency(table[:, keep], correction=False, lambda_="log-likelihood").statistic)
        assert value == pytest.approx(max(g), rel=1e-10)


def test_permutation_maxima_equal_the_one_hot_statistics(rng):
    for n, s, trim in ((56, 6, 6), (200, 12, 20), (720, 28, 72)):
        idx = rng.integers(0, s, size=n)
        rows = idx[np.argsort(rng.random((50, n)), axis=1)]
        # source: split_statistics (one-hot counts, the formula of the module docstring) is the reference
        np.testing.assert_allclose(
            permutation_maxima(rows, s, trim), split_statistics(rows, s, trim).max(axis=1), rtol=1e-11
        )


def test_permutation_maxima_in_blocks_equal_each_row_alone(rng, monkeypatch):
    # the rows are worked in cache-sized blocks; a row's value must not depend on its block
    import fitaudit.core.change as change

    n, s, trim = 300, 20, 30
    idx = rng.integers(0, s, size=n)
    rows = idx[np.argsort(rng.random((23, n)), axis=1)]
    monkeypatch.setattr(change, "_BLOCK_ELEMENTS", 5 * n)  # blocks of 5 rows, the last of 3
    blocked = permutation_maxima(rows, s, trim)
    alone = np.array([permutation_maxima(row[None, :], s, trim)[0] for row in rows])
    assert np.array_equal(blocked, alone)
    # source: split_statistics (one-hot counts) is the reference, as above
    np.testing.assert_allclose(blocked, split_statistics(rows, s, trim).max(axis=1), rtol=1e-11)


def test_power_generator_without_near_one_cells_skips_only_the_series(rng):
    # counts of a few dozen per cell rarely give |log(p/q)| below the series radius, and then the
    # series is not computed at all; the other cells' values must be those of the full recipe
    from fitaudit.core.divergence import _SERIES_RADIUS, _phi_log_argument

    alphas = np.r_[np.arange(-1.0, 3.01, 0.25), 2.0 / 3.0, 5.0 / 3.0][None, :, None]
    for _ in range(50):
        u = rng.normal(0.0, rng.choice([0.05, 1.0, 40.0]), size=(1, 1, 30))
        u = np.where(np.abs(u) < 4 * _SERIES_RADIUS, 0.5, u)  # no cell near one for any alpha
        with np.errstate(all="ignore"):
            fast = _phi_log_argument(u, alphas)
            full = _phi_log_argument(np.concatenate([u, [[[1e-6]]]], axis=2), alphas)  # forces the series path
        assert np.array_equal(fast, full[..., :-1], equal_nan=True)
        # source: the defining formula (t^a - 1 - a (t - 1)) / (a (a - 1)) away from a = 0, 1 and t = 1
        t_, a_ = np.exp(u[0, 0]), alphas[0, 6, 0]  # alpha = 0.5
        with np.errstate(all="ignore"):
            naive = (t_**a_ - 1 - a_ * (t_ - 1)) / (a_ * (a_ - 1))
        ok = np.isfinite(naive) & (np.abs(u[0, 0]) < 30)
        np.testing.assert_allclose(fast[0, 6][ok], naive[ok], rtol=1e-9)


@pytest.mark.parametrize("seed", range(6))
def test_locate_change_matches_the_original_loop(seed):
    rng = np.random.default_rng(100 + seed)
    n = int(rng.integers(60, 700))
    errors = np.r_[rng.normal(size=n // 2), rng.normal(rng.uniform(0, 1.5), rng.uniform(0.7, 2.0), size=n - n // 2)]
    permutations = 199 if seed % 2 else 499
    res = locate_change(errors, permutations=permutations, seed=seed)
    index, statistic, p_value = _reference_locate_change(errors, permutations, seed)
    # source: the pre-issue-7 implementation above (same seed, same permutations)
    assert (res.index, res.statistic, res.p_value) == (index, statistic, p_value)


def test_locate_change_with_the_runs_permutations_matches_the_original_loop():
    from fitaudit.core.calibration import CalibrationCache

    rng = np.random.default_rng(7)
    cache = CalibrationCache()
    for shift in (0.0, 0.6, 1.2):  # three series of one length: the second and third reuse the permutations
        errors = np.r_[rng.normal(size=300), rng.normal(shift, 1.0, size=200)]
        res = locate_change(errors, permutations=499, seed=4, cache=cache)
        # source: the pre-issue-7 implementation above (same seed, same permutations)
        assert (res.index, res.statistic, res.p_value) == _reference_locate_change(errors, 499, 4)
    assert len(cache._draws) == 1 and len(cache) == 0  # made once, and not a table (never stored or merged)
    assert pickle.loads(pickle.dumps(cache))._draws == {}  # kept in this process only


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    from fitaudit.demo import write_demo

    return write_demo(tmp_path_factory.mktemp("optimisations-demo"))


@pytest.fixture(scope="module")
def registry(demo):
    from fitaudit.tasks.registry import load_registry

    return load_registry(demo["registry"])


def test_staging_in_several_scans_writes_the_same_batches(demo, registry, tmp_path):
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks.batches import stage_inputs
    from fitaudit.tasks.batchfiles import read_batch

    one = stage_inputs(
        registry, DEMO_AS_OF, tmp_path / "one", archive_root=demo["archive"], batch_size=4, series_per_scan=10**6
    )
    many = stage_inputs(
        registry, DEMO_AS_OF, tmp_path / "many", archive_root=demo["archive"], batch_size=4, series_per_scan=8
    )
    assert [b.model_ids for b in one.batches] == [b.model_ids for b in many.batches]
    assert one.fingerprints == many.fingerprints and one.source_errors == many.source_errors
    for a, b in zip(one.batches, many.batches):
        # source: the single-scan staging (the reference) wrote these files
        assert pathlib.Path(a.path + ".json").read_bytes() == pathlib.Path(b.path + ".json").read_bytes()
        for x, y in zip(read_batch(a.path), read_batch(b.path)):
            assert np.array_equal(x.y, y.y, equal_nan=True) and np.array_equal(x.time, y.time)
            assert x.exog.keys() == y.exog.keys() and all(
                np.array_equal(x.exog[k], y.exog[k], equal_nan=True) for k in x.exog
            )


@pytest.fixture(scope="module")
def demo_outcomes(demo, registry, tmp_path_factory):
    """Six demo models with every verdict, staged in two batches: the batches, and their final
    outcomes audited in full and light (spilled)."""
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks.audit import audit_batch, audit_batch_spilled, calibration_for, finalize
    from fitaudit.tasks.batches import stage_inputs

    wanted = ["demand-d-02", "demand-d-07", "demand-d-13", "demand-d-22", "demand-d-25", "energy-pump-01"]
    folder = tmp_path_factory.mktemp("optimisations-outcomes")
    staged = stage_inputs(registry, DEMO_AS_OF, folder, archive_root=demo["archive"], model_ids=wanted, batch_size=3)
    paths = [b.path for b in staged.batches]
    cache = calibration_for(paths, registry.policy)
    full = finalize([o for p in paths for o in audit_batch(p, registry.policy, cache)], registry.policy)
    light = finalize([o for p in paths for o in audit_batch_spilled(p, registry.policy, cache)], registry.policy)
    return staged, full, light


def test_light_outcomes_restored_after_the_fleet_rules_equal_full_ones(demo_outcomes):
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks.audit import records, restore_outcomes, spill_path

    staged, full, light = demo_outcomes
    restored, start = [], 0
    for batch in staged.batches:
        restored += restore_outcomes(light[start : start + len(batch.model_ids)], spill_path(batch.path))
        start += len(batch.model_ids)
    assert {o.verdict for o in full} >= {"pass", "refit", "respecify", "insufficient"}
    # source: the fleet rules applied to the full outcomes (the unoptimised path)
    assert records(restored, DEMO_AS_OF.isoformat()) == records(full, DEMO_AS_OF.isoformat())


def test_records_hold_string_keys_only_so_their_json_needs_no_conversion(demo_outcomes):
    """stage_records writes a record with ``canonical_json(..., str_keys=True)``: json.dumps of the
    record itself, which sorts keys before turning them into text; the same bytes as the full
    conversion only while every key is a string."""
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks._io import canonical_json
    from fitaudit.tasks.audit import records

    def keys(value):
        if isinstance(value, dict):
            yield from value
            for v in value.values():
                yield from keys(v)
        elif isinstance(value, (list, tuple)):
            for v in value:
                yield from keys(v)

    _, full, _ = demo_outcomes
    recs = records(full, DEMO_AS_OF.isoformat())
    assert {type(k) for rec in recs for k in keys(rec)} == {str}
    for rec in recs:
        # source: the full conversion (json_ready, then json.dumps), the path before the shortcut
        assert canonical_json(rec, str_keys=True) == canonical_json(rec)


def test_the_candidate_search_handed_the_audits_independence_flags_finds_the_same_candidates(demo, registry, tmp_path):
    """The search asks first whether the failing spec's refit check flags its independence gate
    (then no other law can pass).  The audit's light outcomes after the fleet rules hold that
    check: handed its flag, the search neither refits nor checks the spec again, and finds what
    it finds when it checks itself.  The demo's two respecify models cover both answers."""
    from fitaudit.core.candidates import _independence_rejects
    from fitaudit.core.models import as_model
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks.audit import audit_batch_spilled, calibration_for, candidates_for, finalize, independence_flags
    from fitaudit.tasks.batches import stage_inputs
    from fitaudit.tasks.batchfiles import read_batch

    wanted = ["demand-d-13", "demand-d-19"]
    staged = stage_inputs(registry, DEMO_AS_OF, tmp_path, archive_root=demo["archive"], model_ids=wanted)
    (batch,) = staged.batches
    cache = calibration_for([batch.path], registry.policy)
    light = finalize(audit_batch_spilled(batch.path, registry.policy, cache), registry.policy)
    flags = independence_flags(light)
    assert flags == {"demand-d-13": False, "demand-d-19": True}
    for item in read_batch(batch.path, wanted):
        entry = item.entry
        # source: the search's own check of the spec, refitted (the path without the flag)
        checked = _independence_rejects(
            item.y,
            as_model(dict(entry.spec)),
            entry.noise_law(),
            item.exog or None,
            entry.audit_settings(registry.policy),
            cache,
        )
        assert flags[item.model_id] == checked
    reference = candidates_for(batch.path, wanted, registry.policy, cache)
    assert candidates_for(batch.path, wanted, registry.policy, cache, flags) == reference
    assert set(reference) == set(wanted)


def test_candidate_lanes_search_every_model_once_and_find_what_one_search_finds(demo, registry, tmp_path):
    from concurrent.futures import ThreadPoolExecutor

    from fitaudit.core.calibration import CalibrationCache, prepare_calibration
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks.audit import candidate_jobs, candidate_tables, candidates_claimed, candidates_for, lanes_cache
    from fitaudit.tasks.batches import stage_inputs

    wanted = ["demand-d-02", "demand-d-07", "demand-d-13", "energy-pump-01", "notebook-leak-01"]
    staged = stage_inputs(registry, DEMO_AS_OF, tmp_path, archive_root=demo["archive"], model_ids=wanted, batch_size=2)
    jobs = candidate_jobs(staged.batches, wanted[1:])
    assert [m for _, ids in jobs for m in ids] == [m for b in staged.batches for m in b.model_ids if m != wanted[0]]
    tables = candidate_tables(jobs, registry.policy)
    assert len(tables) >= 2
    # source: the shared tables built before one search per batch in this process (the plain pipeline's way)
    reference_cache = CalibrationCache()
    for entries in tables:
        prepare_calibration(entries, reference_cache)
    reference = {}
    for path, ids in jobs:
        reference.update(candidates_for(path, ids, registry.policy, reference_cache))
    claims = tmp_path / "claims"
    start = lanes_cache(CalibrationCache(), tmp_path / "scratch")  # no archive store: one in the scratch folder
    with ThreadPoolExecutor(3) as pool:
        lanes = list(pool.map(lambda _: candidates_claimed(jobs, tables, registry.policy, start, str(claims)), "abc"))
    searched = [m for found, _ in lanes for m in found]
    assert sorted(searched) == sorted(reference)  # every model once, in exactly one lane
    assert {m: v for found, _ in lanes for m, v in found.items()} == reference
    shared = CalibrationCache()
    for _, part in lanes:
        shared.merge(part)
    searched_only = {k for k in reference_cache.tables if "shape estimated" in k}  # a search's own tables
    assert set(shared.tables) == set(reference_cache.tables) - searched_only
    assert all(np.array_equal(shared.tables[k].r_max, reference_cache.tables[k].r_max) for k in shared.tables)
    assert candidates_claimed(jobs, tables, registry.policy, start, str(claims))[0] == {}  # all claimed already


@pytest.mark.slow
def test_local_workers_run_elsewhere_and_fall_back_in_place():
    from fitaudit.tasks.workers import local_workers, run_local

    with local_workers(2) as token:
        assert token is not None
        assert run_local(token, os.getpid) != os.getpid()
    assert run_local(token, os.getpid) == os.getpid()  # the pool is gone: computed in place
    with local_workers(1) as token:
        assert token is None


@pytest.mark.slow
def test_null_tables_begun_while_staging_are_the_tables_calibration_builds(demo, registry, tmp_path, monkeypatch):
    """The run's shared null tables begin on the spare workers as each batch is staged; the
    calibration stage takes them and builds none of them again, and the run's tables are those
    it builds from the staged batches alone, in the same order."""
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks import workers
    from fitaudit.tasks.audit import EarlyTables, calibration_for
    from fitaudit.tasks.audit import work as audit_work
    from fitaudit.tasks.batches import stage_inputs
    from fitaudit.tasks.batchfiles import batch_metadata

    workers.start_spare_workers(2)
    try:
        early = EarlyTables(registry.policy)
        staged = stage_inputs(
            registry, DEMO_AS_OF, tmp_path, archive_root=demo["archive"], batch_size=10, on_batch=early.batch_staged
        )
        paths = [b.path for b in staged.batches]
        begun = len(early._begun)
        built_here = []
        real_build = audit_work.build_tables

        def counting(jobs, cache=None):
            built_here.extend(jobs)
            return real_build(jobs, cache)

        monkeypatch.setattr(audit_work, "build_tables", counting)
        with_early = calibration_for(paths, registry.policy, early=early)
    finally:
        workers.stop_spare_workers()
    assert len(staged.batches) > 1 and begun >= 2 and not early._begun  # begun, and every one taken
    for path in paths:  # what the tables depend on, as staged: the same as read back from the batch files
        read_back = [audit_work._calibration_entry(m["entry"], m, registry.policy) for m in batch_metadata(path)]
        assert early.entries(path) == read_back and any(read_back)
    assert built_here == []  # none built again
    # source: the tables built from the staged batches in this process (the path without early tables)
    reference = calibration_for(paths, registry.policy)
    assert len(built_here) == begun  # the reference built each table itself
    assert list(with_early.tables) == list(reference.tables)
    for key, table in reference.tables.items():
        assert np.array_equal(with_early.tables[key].r_max, table.r_max)
        assert np.array_equal(with_early.tables[key].reference, table.reference)
    # without spare workers nothing is begun, and the calibration stage builds every table itself
    idle = EarlyTables(registry.policy)
    again = stage_inputs(
        registry, DEMO_AS_OF, tmp_path / "idle", archive_root=demo["archive"], batch_size=10, on_batch=idle.batch_staged
    )
    again_paths = [b.path for b in again.batches]
    assert not idle._begun and all(idle.entries(path) for path in again_paths)
    assert list(calibration_for(again_paths, registry.policy, early=idle).tables) == list(reference.tables)


@pytest.mark.slow
def test_spare_workers_are_taken_over_by_a_run_of_their_size_and_stopped_otherwise():
    import gc

    from fitaudit.tasks import workers

    workers.start_spare_workers(2)
    spare = workers._SPARE[0][1]
    workers.start_spare_workers(2)  # at most one spare pool
    assert len(workers._SPARE) == 1
    with workers.local_workers(2) as token:
        assert workers._POOLS[token] is spare and not workers._SPARE  # taken over, not started again
        assert workers.run_local(token, os.getpid) != os.getpid()
        # the spare's workers made their imports (in turn) and froze them, as a run's own workers do
        assert workers.run_local(token, gc.get_freeze_count) > 10_000
    with pytest.raises(RuntimeError):  # stopped with the run
        spare.submit(os.getpid)

    workers.start_spare_workers(2)
    spare = workers._SPARE[0][1]
    with workers.local_workers(3) as token:  # another size: the spare is stopped, the run starts its own
        assert workers._POOLS[token] is not spare and not workers._SPARE
    with pytest.raises(RuntimeError):
        spare.submit(os.getpid)

    workers.start_spare_workers(2)
    spare = workers._SPARE[0][1]
    with workers.local_workers(1) as token:  # a run that computes in place stops it too
        assert token is None and not workers._SPARE
    with pytest.raises(RuntimeError):
        spare.submit(os.getpid)
    workers.stop_spare_workers()  # nothing left to stop
    workers.start_spare_workers(1)  # one process: nothing started
    assert not workers._SPARE


@pytest.mark.slow
def test_map_local_spreads_the_calls_over_the_workers_and_keeps_their_order():
    from fitaudit.tasks.workers import local_workers, map_local

    calls = [(f"{i:03d}",) for i in range(12)]
    with local_workers(2) as token:
        assert map_local(token, int, calls) == list(range(12))
        assert os.getpid() not in map_local(token, os.getpid, [()] * 4)
    assert map_local(None, int, calls) == list(range(12))  # in place


def _reference_run(
    demo: dict, registry, archive: pathlib.Path, work: pathlib.Path, meta: dict
) -> tuple[bytes, dict, list]:
    """The plain pipeline: the same stage functions in this process, whole document and pages in memory."""
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.tasks._io import canonical_json
    from fitaudit.tasks.audit import (
        audit_batch,
        calibration_for,
        candidates_for,
        finalize,
        records,
        rejected_outcome,
        wants_candidates,
        with_candidates,
    )
    from fitaudit.tasks.batches import stage_inputs
    from fitaudit.tasks.outcomes import results_rows
    from fitaudit.tasks.report import render_run
    from fitaudit.tasks.results import build_results

    staged = stage_inputs(
        registry, DEMO_AS_OF, work, archive_root=str(archive), model_ids=DEMO_SUBSET, series_per_scan=10**6
    )
    cache = calibration_for([b.path for b in staged.batches], registry.policy)
    outcomes = [o for b in staged.batches for o in audit_batch(b.path, registry.policy, cache)]
    outcomes += [rejected_outcome(r) for r in registry.rejected if r.id in DEMO_SUBSET]
    final = finalize(outcomes, registry.policy)
    todo = {o.model_id for o in final if wants_candidates(o)}
    found = {}
    for b in staged.batches:
        if todo.intersection(b.model_ids):
            found.update(candidates_for(b.path, [m for m in b.model_ids if m in todo], registry.policy, cache))
    doc = build_results(
        as_of=DEMO_AS_OF.isoformat(),
        registry={"path": pathlib.Path(registry.path).name, "sha256": registry.sha256},
        policy=registry.policy.to_dict(),
        records=records(with_candidates(final, found), DEMO_AS_OF.isoformat()),
        tool_version=meta["tool_version"],
    )
    return canonical_json(doc), render_run(doc, meta), results_rows(doc)


@pytest.mark.slow
@pytest.mark.server
def test_audit_flow_matches_the_plain_pipeline(demo, registry, prefect_server, tmp_path, monkeypatch):
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.flows.audit import audit_flow
    from fitaudit.tasks.report import environment

    archive = tmp_path / "archive"
    shutil.copytree(demo["archive"], archive)
    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_PROCESSES", "2")  # worker processes even for a small run
    run = audit_flow(
        registry=demo["registry"], as_of=DEMO_AS_OF, archive=str(archive), models=DEMO_SUBSET, batch_size=3
    )
    folder = pathlib.Path(run["report"]).parent
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["batches"] >= 4 and run["counts"]["registered"] == len(DEMO_SUBSET)
    meta = {
        k: manifest[k] for k in ("run_id", "started_utc", "finished_utc", "operator", "tool_version", "code_commit")
    }
    meta["prefect_version"] = manifest["packages"]["prefect"]
    extends = manifest["extends"]
    meta.update(
        archive_head=f"{extends['chain_head']} (seq {extends['chain_seq']})" if extends["chain_head"] else None,
        previous_run_id=extends["previous_run_id"],
        previous_as_of=extends["previous_as_of"],
        fleet_trend=manifest["fleet_trend"],
        scope=dict(manifest["scope"], models_requested=len(manifest["scope"]["models_requested"] or ()) or None),
    )

    macro = environment().from_string(REFERENCE_SVG_MACRO).module.svg
    monkeypatch.setitem(environment().filters, "svg", macro)  # the reference renders charts with the old macro
    rows = environment().from_string(REFERENCE_ROW_MACROS).module  # and the tables' rows with the old loops
    monkeypatch.setitem(environment().filters, "num_rows", rows.num_rows)
    monkeypatch.setitem(environment().filters, "map_rows", rows.map_rows)
    reference_json, reference_pages, reference_rows = _reference_run(demo, registry, archive, tmp_path / "work", meta)

    assert {m["verdict"] for m in json.loads(reference_json)["models"]} == set(VERDICTS)
    # source: the plain pipeline above (unoptimised reference), byte for byte
    assert (folder / "results.json").read_bytes() == reference_json
    written = sorted(str(p.relative_to(folder)) for p in folder.rglob("*.html"))
    assert written == sorted(reference_pages)
    for rel, data in reference_pages.items():
        assert (folder / rel).read_bytes() == data, rel
    assert pq.read_table(folder / "results.parquet").to_pylist() == reference_rows


def test_streamed_results_json_equals_canonical_json():
    from fitaudit.tasks._io import canonical_json
    from fitaudit.tasks.results import results_head, results_json_chunks

    head = results_head(
        as_of="2026-11-30",
        registry={"path": "r.yaml", "sha256": "ab"},
        policy={"level": 0.05, "z": [1, 2]},
        tool_version="0",
    )
    summary = {"registered": 2, "x": float("inf")}
    models = [{"id": "a", "v": [1.5, None, "é"]}, {"id": "b", "w": {"z": 1, "a": 2}}]
    streamed = b"".join(results_json_chunks(head, summary, [canonical_json(m) for m in models]))
    # source: canonical_json of the whole document (the unoptimised writer)
    assert streamed == canonical_json({**head, "summary": summary, "models": models})
    assert b"".join(results_json_chunks(head, summary, [])) == canonical_json(
        {**head, "summary": summary, "models": []}
    )


def _reference_format_number(v: float, digits: int) -> str:
    """The report's number format for a float before its fixed-notation branch moved first (kept as it was)."""
    import math

    if v != v:
        return "n/a"
    if math.isinf(v):
        return "∞" if v > 0 else "-∞"
    if v == 0:
        return "0"
    a = abs(v)
    if a < 1e-4 or a >= 1e6:
        return f"{v:.{digits - 1}e}"
    decimals = max(0, digits - 1 - math.floor(math.log10(a)))
    text = f"{v:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if float(text) == 0 else text


def test_report_number_and_coordinate_texts_match_the_unoptimised_ones():
    from fitaudit.tasks.report.charts import _CoordText
    from fitaudit.tasks.report.text import coord, format_number

    rng = np.random.default_rng(7)
    halves = (9.5, 9.95, 9.995, 9.9995, 4.95, 4.995, 4.9995, 0.99995)  # where rounding reaches the next power of ten
    edges = [s * 10.0**k for k in range(-6, 8) for s in (1.0, -1.0, 0.5, -9.995) + halves]
    spread = rng.lognormal(0.0, 4.0, 20000) * rng.choice([-1, 1], 20000)
    values = edges + [np.nextafter(x, 0.0) for x in edges] + [np.nextafter(x, 2 * x) for x in edges] + list(spread)
    values = [float(x) for x in values] + [0.0, -0.0, float("inf"), float("-inf"), float("nan")]
    for digits in (1, 2, 3, 4, 6):
        # source: the reference above (the unoptimised format)
        assert [format_number(x, digits) for x in values] == [_reference_format_number(x, digits) for x in values]
    px = _CoordText().__getitem__
    shown = [0.0, -0.0, 0.04, -0.04, 1.05, 12.25, 0.0, -0.0, 1.05, float("nan"), float("nan")]
    assert [px(x) for x in shown] == [coord(x) for x in shown]  # source: coord itself; 0.0 and -0.0 print 0 and -0


def test_row_filters_write_what_the_template_loops_wrote():
    import markupsafe

    from fitaudit.tasks.report.render import environment
    from fitaudit.tasks.report.table_cells import map_rows, num_rows

    loops = environment().from_string(REFERENCE_ROW_MACROS).module
    texts = ["0.125", "< 0.001", "n/a", "∞", "a&b\"<c>'", 7, None, markupsafe.Markup("<b>1</b>"), ""]
    pairs = [texts[k : k + 2] for k in range(0, len(texts) - 1)]
    dicts = [{"cell": t, "bin": f"[{k}, {k + 1})", "a": t, "b": texts[-1 - k]} for k, t in enumerate(texts)]
    # source: the template loops the filters replaced (REFERENCE_ROW_MACROS), autoescape on
    assert str(num_rows(pairs)) == str(loops.num_rows(pairs))
    assert str(num_rows(dicts, ("a", "b"), head="cell")) == str(loops.num_rows(dicts, ("a", "b"), head="cell"))
    assert str(num_rows(dicts, ("b",), head="bin", head_class="")) == str(
        loops.num_rows(dicts, ("b",), head="bin", head_class="")
    )
    assert str(num_rows([])) == str(loops.num_rows([])) == ""
    maps = [{"alpha": t, "cells": [(u, k % 2 == 0) for k, u in enumerate(texts)]} for t in texts]
    assert str(map_rows(reversed(maps))) == str(loops.map_rows(list(reversed(maps))))
    assert isinstance(num_rows(pairs), markupsafe.Markup)  # not escaped a second time by the page


def test_json_fast_paths_keep_every_conversion():
    from fitaudit.core._plain import plain_data  # the records' conversion (its defaults)
    from fitaudit.tasks._io import canonical_json, json_ready

    inf, nan = float("inf"), float("nan")
    # source: the element-by-element conversions (docstrings of json_ready and plain_data)
    assert json_ready([1.5, inf, -inf, nan]) == [1.5, "inf", "-inf", "nan"]
    assert json_ready([1e308, 1e308]) == [1e308, 1e308]  # a sum that overflows takes the slow path, values kept
    assert json_ready((1, True, None, "a")) == [1, True, None, "a"]
    assert json_ready([np.int64(3), 2.0]) == [3, 2.0] and type(json_ready([np.int64(3)])[0]) is int
    assert plain_data([1.5, inf, nan]) == [1.5, "inf", None]
    assert plain_data((np.float64(2.5), 1)) == [2.5, 1] and type(plain_data([np.float64(2.5)])[0]) is float
    assert canonical_json({"a": [0.1, 0.2], "b": [inf]}) == b'{"a":[0.1,0.2],"b":["inf"]}'


def test_the_one_json_conversion_writes_each_call_site_as_before():
    """Records, divergence maps and canonical JSON write what their own converters wrote before the merge.

    Before the merge ``core/results.py`` ``_plain`` (records: NaN as None), ``core/divergence.py``
    ``_inf_to_str``/``_nan_to_none`` (NaN kept; ``alpha_max`` NaN as None) and ``tasks/_io.py``
    ``json_ready`` (NaN as "nan"; paths and dates as strings) were three converters; the expected
    values below were worked out by hand from those functions.  JSON texts are compared so that
    ``3`` and ``3.0``, ``None``, ``"nan"`` and ``NaN`` all differ.
    """
    import datetime as dt

    from fitaudit.core.divergence import DivergenceMap
    from fitaudit.core.results import AuditResult
    from fitaudit.tasks._io import canonical_json, json_ready

    inf, nan = float("inf"), float("nan")
    nested = {
        "a": (1.5, nan, inf, -inf),
        "b": [
            np.float32(0.5),
            np.int64(3),
            np.float32(np.inf),
            np.float64(-np.inf),
            np.float32(np.nan),
            np.float64(2.5),
        ],
        "c": np.array([[1.0, np.nan], [np.inf, -np.inf]]),
        "d": {"e": (np.arange(2), True, None), 7: {"f": np.array([0.25, 2.0], dtype=np.float32)}},
    }

    # records (AuditResult.to_dict, old _plain): NaN -> None, infinities -> strings, numpy -> Python
    record = AuditResult("pass", (), None, None, spec=nested, noise="normal", accuracy=nested).to_dict()
    expected = {
        "a": [1.5, None, "inf", "-inf"],
        "b": [0.5, 3, "inf", "-inf", None, 2.5],
        "c": [[1.0, None], ["inf", "-inf"]],
        "d": {"e": [[0, 1], True, None], "7": {"f": [0.25, 2.0]}},
    }
    assert json.dumps(record["spec"]) == json.dumps(record["accuracy"]) == json.dumps(expected)
    assert [type(x) for x in record["spec"]["b"]] == [float, int, str, str, type(None), float]  # np.float64 too

    # canonical JSON (old json_ready): NaN -> "nan"; a finite numpy.float64 (a float) is kept as it is
    ready = json_ready(nested)
    expected = {
        "a": [1.5, "nan", "inf", "-inf"],
        "b": [0.5, 3, "inf", "-inf", "nan", 2.5],
        "c": [[1.0, "nan"], ["inf", "-inf"]],
        "d": {"e": [[0, 1], True, None], "7": {"f": [0.25, 2.0]}},
    }
    assert json.dumps(ready) == json.dumps(expected)
    assert [type(x) for x in ready["b"]] == [float, int, str, str, str, np.float64]
    assert canonical_json(nested) == (
        b'{"a":[1.5,"nan","inf","-inf"],"b":[0.5,3,"inf","-inf","nan",2.5],"c":[[1.0,"nan"],["inf","-inf"]],'
        b'"d":{"7":{"f":[0.25,2.0]},"e":[[0,1],true,null]}}'
    )
    leaves = {"p": pathlib.PurePosixPath("x/y"), "t": dt.date(2024, 1, 2)}
    assert json_ready(leaves) == {"p": "x/y", "t": "2024-01-02"}
    assert AuditResult("pass", (), None, None, spec=leaves, noise="normal").to_dict()["spec"] == leaves  # kept
    with pytest.raises(TypeError, match="cannot serialise set to JSON"):
        json_ready({"s": {1}})

    # divergence map (old _inf_to_str: NaN kept, infinities -> strings; _nan_to_none: alpha_max NaN -> None)
    m = DivergenceMap(
        statistic=nested["c"],
        n=10,
        cells=3,
        alphas=np.array([0.5, 1.0]),
        betas=np.array([0.0, 1.0]),
        scaling="model",
        r=None,
        infinite=np.isinf(nested["c"]),
        t_max=np.float32(np.inf),
        argmax=(np.int64(-1), -1),
        members={"pearson": nested["a"], "neyman": (nested["b"][:2], np.array([-inf, 0.25])), "g": np.float64(nan)},
    ).to_dict()
    expected = {
        "statistic": [[1.0, nan], ["inf", "-inf"]],
        "n": 10,
        "cells": 3,
        "alphas": [0.5, 1.0],
        "betas": [0.0, 1.0],
        "scaling": "model",
        "r": None,
        "infinite": [[False, False], [True, True]],
        "t_max": "inf",
        "argmax": [-1, -1],
        "alpha_max": None,
        "beta_max": None,
        "members": {"pearson": [1.5, nan, "inf", "-inf"], "neyman": [[0.5, 3.0], ["-inf", 0.25]], "g": nan},
    }
    assert json.dumps(m) == json.dumps(expected)  # NaN written as NaN: the map's own view keeps it


def test_the_direct_filter_call_equals_scipy_lfilter():
    """core/_scipy.py ``lfilter`` skips scipy's argument checks; every form the models use gives
    scipy.signal.lfilter's numbers exactly (source: scipy.signal.lfilter)."""
    from scipy import signal

    from fitaudit.core._scipy import lfilter

    rng = np.random.default_rng(5)
    x = rng.normal(size=(3, 200))
    b = np.array([1.0, 0.4, -0.2])
    for a in (np.array([1.0, -0.6, 0.25]), np.array([2.0, -0.6, 0.25]), np.ones(1)):
        assert np.array_equal(lfilter(b, a, x, axis=-1), signal.lfilter(b, a, x, axis=-1))
        assert np.array_equal(lfilter(b, a, x[1, ::-1]), signal.lfilter(b, a, x[1, ::-1]))  # a reversed view
        assert np.array_equal(lfilter(b, a, x.T, axis=0), signal.lfilter(b, a, x.T, axis=0))
    a = np.array([1.0, -0.6, 0.25])
    zi = rng.normal(size=(3, 2))
    ours, theirs = lfilter(b, a, x, axis=-1, zi=zi), signal.lfilter(b, a, x, axis=-1, zi=zi)
    assert np.array_equal(ours[0], theirs[0]) and np.array_equal(ours[1], theirs[1])
    assert np.array_equal(lfilter([1.0], a, x[0]), signal.lfilter([1.0], a, x[0]))  # a list: scipy's own path


def _same_lbfgsb_result(ours, theirs) -> bool:
    return (
        np.array_equal(ours.x, theirs.x)
        and ours.fun == theirs.fun
        and np.array_equal(ours.jac, theirs.jac)
        and (ours.nfev, ours.nit, ours.status, ours.message, ours.success)
        == (theirs.nfev, theirs.nit, theirs.status, theirs.message, theirs.success)
    )


def _smoothing_searches():
    """(objective, start, bounds) of the smoothing fits' searches on series shipped with statsmodels."""
    from statsmodels.datasets import co2, elec_equip, macrodata

    from fitaudit.core.models.smoothing import ExpSmoothing, _AdditiveProfile

    co2_monthly = co2.load_pandas().data["co2"].resample("MS").mean().ffill().to_numpy()
    cases = [
        (ExpSmoothing(trend="add", damped=True, seasonal="add", period=12), co2_monthly),
        (ExpSmoothing(trend="add", damped=True, seasonal="add", period=12), elec_equip.load_pandas().data.iloc[:, 0]),
        (ExpSmoothing(trend="add", damped=True), macrodata.load_pandas().data["realgdp"]),
        (ExpSmoothing(seasonal="add", period=4), macrodata.load_pandas().data["unemp"]),
    ]
    for spec, y in cases:
        profile = _AdditiveProfile(spec, np.asarray(y, dtype=float))
        grid = np.array(spec._start_grid())
        with np.errstate(over="ignore", invalid="ignore"):
            values = profile.objective_values(spec._to_natural(grid))
        for i in np.argsort(values, kind="stable")[:3]:
            yield profile.objective, grid[i], spec._bounds()[: len(spec._smoothing_names())]


def _reference_fit_multiplicative(self, y):
    """``ExpSmoothing._fit_multiplicative`` before the residuals brought the Jacobian along: the
    residuals of one parameter vector per call, the central differences in a call of their own."""
    from fitaudit.core._scipy import optimize
    from fitaudit.core.models.smoothing import _NONFINITE_PENALTY, _central_batch, _rounded

    scale = float(np.mean(y))
    ys = y / scale
    names = self.param_names()[:-1]
    bounds = self._bounds()
    lower = np.array([-np.inf if lo is None else lo for lo, _ in bounds])
    upper = np.array([np.inf if hi is None else hi for _, hi in bounds])

    def residuals(z):
        e = self._multiplicative_errors(ys, self._to_natural(z[None, :]))[0]
        return np.where(np.isfinite(e), e, _NONFINITE_PENALTY)

    def jacobian(z):
        Z, step = _central_batch(z)
        E = self._multiplicative_errors(ys, self._to_natural(Z[1:]))
        J = (E[0::2] - E[1::2]).T / (2.0 * step)
        return np.where(np.isfinite(J), J, 0.0)

    runs = [
        optimize.least_squares(
            residuals,
            np.clip(self._to_optimiser(start), lower, upper),
            jac=jacobian,
            bounds=(lower, upper),
            method="trf",
            x_scale="jac",
            ftol=1e-12,
            xtol=1e-12,
            gtol=1e-10,
            max_nfev=500,
        )
        for start in self._multiplicative_starts(ys)
    ]
    res = min(runs, key=lambda r: (_rounded(r.cost), not r.success))
    vec = self._to_natural(res.x[None, :])[0]
    for name in ("l0", "b0"):
        if name in names:
            vec[names.index(name)] *= scale
    return vec, res


@pytest.mark.parametrize("trend, damped", [(None, False), ("add", True), ("add", False)])
def test_multiplicative_fits_with_the_jacobian_alongside_equal_the_separate_calls(trend, damped, monkeypatch):
    """The residuals computed with their central differences (the Jacobian ready when the optimiser
    asks for it) give bit for bit the fits of the separate calls, on Mauna Loa CO2 by month
    (statsmodels.datasets.co2) and a daily series with a weekly pattern (simulated, seed 0)."""
    from statsmodels.datasets import co2

    from fitaudit.core.models.smoothing import ExpSmoothing

    rng = np.random.default_rng(0)
    daily = 120 + 10 * np.sin(np.arange(730) * 2 * np.pi / 7) + rng.standard_normal(730).cumsum() * 0.5
    co2_monthly = co2.load_pandas().data["co2"].resample("MS").mean().ffill().to_numpy()[-240:]
    for period, y in ((7, daily), (12, co2_monthly)):
        spec = ExpSmoothing(trend=trend, damped=damped, seasonal="mul", period=period)
        ours = spec.fit(y, standard_errors=False)
        with monkeypatch.context() as patch:
            patch.setattr(ExpSmoothing, "_fit_multiplicative", _reference_fit_multiplicative)
            theirs = spec.fit(y, standard_errors=False)
        assert dict(ours.params) == dict(theirs.params) and ours.loglik == theirs.loglik
        assert ours.converged == theirs.converged


def test_the_direct_lbfgsb_loop_equals_scipy_minimize():
    """core/_scipy.py ``minimize_lbfgsb`` drives scipy's compiled L-BFGS-B step without scipy's wrapper;
    on the smoothing fits' own searches (packaged series, the three best grid starts each) and on a
    problem with each kind of bound, stopped by convergence or by the iteration limit, it returns
    scipy.optimize.minimize's result exactly (source: scipy.optimize.minimize, method "L-BFGS-B")."""
    import scipy
    from scipy import optimize

    from fitaudit.core import _scipy
    from fitaudit.core._scipy import minimize_lbfgsb

    centre = np.array([0.3, -0.4, 2.0, 0.7])

    def quartic(x):
        d = x - centre
        value = float(d @ d + (d[0] * d[1]) ** 2 + d[2] ** 4 + np.sin(3 * d[3]))
        return value, 2 * d + np.array(
            [2 * d[0] * d[1] ** 2, 2 * d[1] * d[0] ** 2, 4 * d[2] ** 3, 3 * np.cos(3 * d[3])]
        )

    every_bound = [(0.0, 1.0), (None, 0.2), (-1.0, None), (None, None)]
    problems = [*_smoothing_searches(), (quartic, np.array([0.9, 0.5, 0.1, 0.0]), every_bound)]
    with np.errstate(over="ignore", invalid="ignore"):
        for fun, start, bounds in problems:
            for maxiter in (500, 3):
                options = {"ftol": 1e-13, "gtol": 1e-9, "maxiter": maxiter}
                theirs = optimize.minimize(fun, start, method="L-BFGS-B", jac=True, bounds=bounds, options=options)
                ours = minimize_lbfgsb(fun, start, bounds, **options)
                assert _same_lbfgsb_result(ours, theirs), (ours, theirs)
    stopped = minimize_lbfgsb(quartic, np.array([0.9, 0.5, 0.1, 0.0]), every_bound, ftol=1e-13, gtol=1e-9, maxiter=3)
    assert (stopped.status, stopped.success) == (1, False)  # the limit case above was reached, not skipped
    # from memory: scipy 1.15 brought the C translation whose step the loop drives (its wrapper's
    # disp and iprint were deprecated then); an older scipy falls back to scipy's function
    if tuple(int(v) for v in scipy.__version__.split(".")[:2]) >= (1, 15):
        assert _scipy._LBFGSB[0] is not None  # the direct loop is what ran, not scipy's function


def test_the_direct_lbfgsb_loop_is_refused_when_it_differs(monkeypatch):
    """The first-call check falls back to scipy's function when the compiled step is missing, fails,
    or makes the loop give another result than scipy.optimize.minimize."""
    import scipy.optimize._lbfgsb as compiled

    from fitaudit.core import _scipy

    real = compiled.setulb
    assert _scipy._checked_lbfgsb_step() is real

    def failing(*args):
        raise TypeError("another signature")

    def nudging(m, x, *rest):  # the loop's iterates moved by one unit in the last place
        real(m, x, *rest)
        x[0] = np.nextafter(x[0], np.inf)

    for replacement in (failing, nudging):
        monkeypatch.setattr(compiled, "setulb", replacement)
        assert _scipy._checked_lbfgsb_step() is None
    monkeypatch.delattr(compiled, "setulb")
    assert _scipy._checked_lbfgsb_step() is None
    monkeypatch.undo()  # scipy's routine back, for scipy's own function
    monkeypatch.setattr(_scipy, "_LBFGSB", [None])  # which then answers
    res = _scipy.minimize_lbfgsb(
        lambda x: (float(x @ x), 2 * x), np.array([1.0]), [(0.5, 2.0)], ftol=1e-12, gtol=1e-10, maxiter=50
    )
    assert res.x.tolist() == [0.5] and res.success


@pytest.mark.parametrize("base_url", ["", "https://audit.example/fitaudit/"])
def test_model_links_built_once_per_run_equal_report_url_per_page(tmp_path, base_url):
    """tasks/events.py resolves the run's models folder once for the verdict events' links; each
    link equals report_url of the page itself (source: tasks/events.py report_url), also when the
    archive is reached through a symbolic link."""
    from fitaudit.tasks.events import _model_urls, report_url

    real = tmp_path / "real-archive"
    (real / "runs" / "r1" / "models").mkdir(parents=True)
    (real / "runs" / "r1" / "models" / "m-1.html").write_text("page")
    linked = tmp_path / "archive"
    linked.symlink_to(real, target_is_directory=True)
    for archive in (real, linked):
        report = archive / "runs" / "r1" / "index.html"
        links = _model_urls(str(report), str(archive), base_url)
        for safe_id in ("m-1", "demand_d.07", "not-written-yet"):
            page = report.parent / "models" / f"{safe_id}.html"
            assert links(safe_id) == report_url(str(page), str(archive), base_url)
    assert _model_urls(None, str(real), base_url)("m-1") is None
