"""The public surface ``import fitaudit``: its names, a light import, and the results loader.

``fitaudit.load_results`` is checked on a run folder the audit flow publishes for a small fleet
(tests/fleet_fixtures.py): its frames must say what the run's ``results.json`` says.
"""

from __future__ import annotations

import json
import pathlib
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures
from fleet_fixtures import (  # noqa: E402
    AR1,
    AS_OF,
    AUDIT,
    N_DAYS,
    Fleet,
    ar1,
    days,
    fitted_params,
    long_table,
    promote_production,
    write_parquet,
)

import fitaudit  # noqa: E402
from fitaudit.core.vocabulary import VERDICTS  # noqa: E402

PUBLIC = {
    "audit_series": "fitaudit.core.audit",
    "audit_forecasts": "fitaudit.core.forecasts",
    "AuditSettings": "fitaudit.core.audit",
    "divergence_map": "fitaudit.core.divergence",
    "scaled_bregman": "fitaudit.core.divergence",
    "locate_change": "fitaudit.core.change",
    "load_results": "fitaudit.tasks.frames",
}


def test_the_public_names_are_the_documented_ones():
    assert sorted(fitaudit.__all__) == sorted(PUBLIC)
    for name, home in PUBLIC.items():
        obj = getattr(fitaudit, name)
        assert obj is getattr(sys.modules[home], name), name
        assert "Parameters" in obj.__doc__, name  # numpydoc
        assert name in dir(fitaudit)
    with pytest.raises(AttributeError, match="no attribute 'audit_flow'"):
        fitaudit.audit_flow  # noqa: B018


def test_importing_fitaudit_loads_no_heavy_library():
    code = "import sys, fitaudit; print(sorted(m for m in ('numpy', 'scipy', 'pandas', 'prefect') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120, check=True)
    assert out.stdout.strip() == "[]"


def test_the_core_functions_work_through_the_public_names():
    # source: Cressie and Read (1984): with m = q, 2 n B at alpha = 2 is Pearson's X2 = sum (o - e)^2 / e
    observed, expected = np.array([30.0, 50.0, 20.0]), np.array([25.0, 50.0, 25.0])
    n = observed.sum()
    b = fitaudit.scaled_bregman(observed / n, expected / n, alpha=2.0, scaling="model")
    assert 2 * n * b == pytest.approx(np.sum((observed - expected) ** 2 / expected))


def test_forecasts_made_elsewhere_are_audited_through_the_public_name():
    from scipy import stats

    rng = np.random.default_rng(3)
    mean = np.cumsum(rng.normal(0, 0.3, 120))
    y = mean + rng.normal(0, 1.0, 120)
    quantiles = {lv: mean + stats.norm.ppf(lv) for lv in (0.1, 0.5, 0.9)}
    result = fitaudit.audit_forecasts(
        y, quantiles=quantiles, settings=fitaudit.AuditSettings(audit_window=56, replicates=99)
    )
    assert result.refit is None and result.production.n == 56 and result.spec["statement"] == "quantiles"
    assert "The model was not refitted by fitaudit" in " ".join(result.reasons)
    # source: Hyndman and Koehler (2006), section 3.4: MASE = mean |y - point| / mean |y_t - y_(t-1)| over the history
    expected = np.mean(np.abs(y[64:] - mean[64:])) / np.mean(np.abs(np.diff(y[:64])))
    assert result.accuracy["mase"] == pytest.approx(expected, rel=1e-12)


def test_a_folder_that_is_not_a_run_is_refused_with_the_fix(tmp_path):
    with pytest.raises(
        FileNotFoundError,
        match=r"not a published run folder.*results\.parquet and manifest\.json.*runs/<year>/<run-id>",
    ):
        fitaudit.load_results(tmp_path)


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory, prefect_server) -> pathlib.Path:
    """A published run of five models: pass, refit (a shifted production version), insufficient,
    error (a NaN in the window) and a rejected registry entry."""
    from fitaudit.flows.audit import audit_flow

    root = tmp_path_factory.mktemp("api-run")
    rng = np.random.default_rng(20261130)
    series = {"pass": ar1(rng), "refit": ar1(rng), "short": ar1(rng)[-50:], "error": ar1(rng)}
    series["error"][N_DAYS - 3] = np.nan
    t = days()
    write_parquet(
        root / "data" / "fleet.parquet", long_table({k: {"date": t[-len(y) :], "y": y} for k, y in series.items()})
    )
    fleet = Fleet(root)
    fleet.source("fleet", "data/fleet.parquet")
    for name in series:
        fleet.model(f"api-{name}", "fleet", name)
    fleet.model("api-rejected", "fleet", "pass", colour="teal")
    archive = root / "archive"
    promote_production(archive, "api-pass", dict(AR1), fitted_params(AR1, series["pass"][: N_DAYS - AUDIT]))
    shifted = fitted_params(AR1, series["refit"][: N_DAYS - AUDIT])
    shifted["intercept"] += 2.0  # the production level is off by about four standard deviations
    promote_production(archive, "api-refit", dict(AR1), shifted)
    run = audit_flow(registry=str(fleet.write()), as_of=AS_OF, archive=str(archive), batch_size=2)
    return pathlib.Path(run["report"]).parent


def _same(frame_value, json_value) -> bool:
    """Equal numbers (non-finite ones are strings in the canonical JSON; None and NaN are missing)."""
    if json_value is None or json_value == "nan":
        return pd.isna(frame_value)
    return float(frame_value) == float(json_value)


@pytest.mark.server
def test_load_results_says_what_results_json_says(run_folder):
    # source: the run's own results.json and manifest.json (the document the report is rendered from)
    doc = json.loads((run_folder / "results.json").read_bytes())
    manifest = json.loads((run_folder / "manifest.json").read_bytes())
    run = fitaudit.load_results(run_folder)

    models = {m["id"]: m for m in doc["models"]}
    assert list(run.verdicts["model_id"]) == sorted(models)
    assert set(run.verdicts["verdict"]) >= {"pass", "refit", "insufficient", "error"}
    for row in run.verdicts.itertuples():
        m = models[row.model_id]
        assert (row.verdict, row.movement, row.escalated, row.owner, row.as_of) == (
            m["verdict"],
            m["movement"],
            m["escalated"],
            m["owner"],
            doc["run"]["as_of"],
        )
        assert row.reason == (m["reasons"][0] if m["reasons"] else "")
        assert pd.isna(row.tier) if m["tier"] is None else row.tier == m["tier"]
    assert list(run.verdicts["verdict"].cat.categories) == list(VERDICTS)
    counts = run.verdicts["verdict"].value_counts()
    assert {v: int(counts[v]) for v in VERDICTS} == {v: doc["summary"][v] for v in VERDICTS}

    expected_checks = [
        (mid, kind)
        for mid in sorted(models)
        for kind in ("production", "refit")
        if (models[mid].get("audit") or {}).get(kind)
    ]
    assert list(zip(run.checks["model_id"], run.checks["check"])) == expected_checks
    for row in run.checks.to_dict("records"):
        check = models[row["model_id"]]["audit"][row["check"]]
        assert row["status"] == check["status"]
        for field in (
            "t_max",
            "r_max",
            "alpha_max",
            "beta_max",
            "p_distribution",
            "p_independence",
            "p_value",
            "p_adjusted",
            "effect_divergence",
            "effect_acf",
        ):
            assert _same(row[field], check.get(field)) if check["status"] == "ok" else pd.isna(row[field]), (
                row["model_id"],
                field,
            )
        if check["status"] == "ok":
            assert (row["n"], row["cells"]) == (check["n"], check["cells"])
    assert (run.checks["status"] == "ok").sum() == doc["summary"]["checks"]
    assert run.manifest == manifest and run.manifest["run_id"] == run_folder.name


@pytest.mark.server
def test_load_results_accepts_the_report_path(run_folder):
    by_folder = fitaudit.load_results(run_folder)
    by_report = fitaudit.load_results(run_folder / "index.html")  # what `fitaudit run` prints
    pd.testing.assert_frame_equal(by_folder.verdicts, by_report.verdicts)
    pd.testing.assert_frame_equal(by_folder.checks, by_report.checks)
