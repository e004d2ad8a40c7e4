"""The shapes of one model's outcome (tasks/outcomes.py, docs/architecture.md §2.12) agree with
each other: each lighter shape keeps what its users read from the heavier one.

The end-to-end guard (the streamed run equals the plain pipeline byte for byte) is
tests/test_optimisations.py; these tests pin the conversions one by one.
"""

from __future__ import annotations

import pickle

import pytest

from fitaudit.core.exceptions import FitauditError
from fitaudit.tasks.outcomes import (
    HISTORY_COLUMNS,
    Outcome,
    history_row,
    light_record,
    model_record,
    parquet_row,
    record,
    records,
    render_parcels,
    restore_outcomes,
    results_rows,
    spill_outcomes,
    spill_path,
)
from fitaudit.tasks.results import results_head, results_summary

AS_OF = "2026-11-30"


def _check(p: float) -> dict:
    """A check's dictionary as ``CheckResult.to_dict()`` gives it, with bulky parts a light record drops."""
    return {
        "status": "ok",
        "n": 120,
        "cells": 8,
        "t_max": 14.2,
        "r_max": 1.31,
        "alpha_max": 0.5,
        "beta_max": 0.5,
        "p_distribution": p,
        "p_independence": 0.4,
        "p_value": p,
        "p_adjusted": min(1.0, 2 * p),
        "effect_divergence": 0.02,
        "effect_acf": 0.1,
        "gate": {"deciding": {"kind": "equiprobable", "cells": 8}, "members": [1, 2, 3]},
        "map": [[0.1, 0.2], [0.3, 0.4]],
        "plots": {"hist": [1, 2, 3]},
    }


def _records() -> list[dict]:
    history = [
        {"as_of": "2026-11-16", "verdict": "pass", "r_max": 0.8, "p_value": 0.6, "run_id": "a"},
        {"as_of": "2026-11-23", "verdict": "refit", "r_max": 1.4, "p_value": 0.01, "run_id": "b"},
    ]
    return [
        model_record(
            {"id": "m1", "owner": "o", "tier": 1, "spec": {"family": "arima"}},
            as_of=AS_OF,
            verdict="refit",
            reasons=["production fails", "refit passes"],
            audit={"production": _check(0.001), "refit": _check(0.3), "change": {"at": 3}},
            spec_text="ARIMA(1,0,0)",
            lineage={"rows": 200},
            settings={"level": 0.05},
            history=history,
            candidates=[{"spec": {}}],
        ),
        model_record(  # never audited: no checks
            {"id": "m2", "safe_id": "m2", "owner": "o"},
            as_of=AS_OF,
            verdict="error",
            reasons=["Registry entry rejected: x"],
            audit=None,
            spec_text="(invalid registry entry)",
        ),
    ]


def test_light_record_gives_the_same_rows_and_summary():
    full = _records()
    light = [light_record(r) for r in full]
    doc = {**results_head(as_of=AS_OF, registry={}, policy={}, tool_version="t"), "models": full}
    # source: the full records (what results.json holds); the light ones must give the same numbers
    assert results_rows({**doc, "models": light}) == results_rows(doc)
    assert results_summary(light, {"level": 0.05}) == results_summary(full, {"level": 0.05})
    assert "lineage" not in light[0] and "map" not in light[0]["audit"]["production"]
    assert light[0]["audit"]["production"]["gate"] == {"deciding": {"kind": "equiprobable"}}
    assert light[0]["exception"] == full[0]["exception"] == {"first_seen": "2026-11-23", "consecutive": 2}


def test_history_row_reads_back_what_the_parquet_row_wrote():
    full = _records()
    rows = [parquet_row(r, AS_OF) for r in full]
    assert set(HISTORY_COLUMNS) <= set(rows[0])
    # the production check ran: its numbers (those of _check(0.001) above) are the history's
    assert history_row(rows[0], AS_OF, "r1") == {
        "as_of": AS_OF,
        "verdict": "refit",
        "r_max": 1.31,
        "p_value": 0.001,
        "run_id": "r1",
    }
    refit_only = dict(rows[0], production_r_max=None, production_p_value=None, refit_r_max=0.9, refit_p_value=0.5)
    back = history_row(refit_only, AS_OF, "r1")
    assert (back["r_max"], back["p_value"]) == (0.9, 0.5)  # no production check: the refit check's numbers
    assert history_row(rows[1], AS_OF, "r1")["r_max"] is None  # an error record has no check


def _outcome(model_id: str, verdict: str = "pass") -> Outcome:
    return Outcome(entry={"id": model_id, "owner": "o"}, verdict=verdict, reasons=("r",), lineage={"rows": 3})


def test_spill_and_restore_keep_the_full_outcome_and_take_the_final_decisions(tmp_path):
    batch = str(tmp_path / "batch-0000.npz")
    full = [_outcome("a"), _outcome("b")]
    light = spill_outcomes(full, batch)
    assert [o.entry for o in light] == [{"id": "a"}, {"id": "b"}] and light[0].lineage == {}
    final = [light[0], Outcome(entry={"id": "b"}, verdict="error", reasons=("late",), candidates=({"x": 1},))]
    restored = restore_outcomes(final, spill_path(batch))
    assert restored[0] == full[0]
    assert (restored[1].verdict, restored[1].reasons, restored[1].candidates) == ("error", ("late",), ({"x": 1},))
    assert restored[1].lineage == {"rows": 3} and restored[1].entry == full[1].entry
    assert record(restored[1], AS_OF)["owner"] == "o"
    with pytest.raises(FitauditError, match="do not match the batch's models"):
        restore_outcomes(final[::-1], spill_path(batch))


def test_render_parcels_split_the_final_outcomes_by_batch():
    batches = [[_outcome("a"), _outcome("b")], [], [_outcome("c", "error")]]
    final = [o for b in batches for o in b]
    parcels, names, spills = render_parcels(final, batches, ["/w/batch-0000.npz", "/w/batch-0001.npz"])
    assert [[o.model_id for o in pickle.loads(p)] for p in parcels] == [["a", "b"], ["c"]]
    assert names == ["batch-0000.npz", "rejected"]  # the last list holds the rejected entries
    assert spills == [spill_path("/w/batch-0000.npz"), None]
    assert records([pickle.loads(parcels[1])[0]], AS_OF)[0]["severity"] == 1  # common practice: errors first
