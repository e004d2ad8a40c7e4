"""Forecast entries (forecasts made elsewhere) through the registry, staging, audit, results, report,
events and refit refusal (fitaudit.tasks.*).

The statistics of the forecast audit are tested in tests/test_forecasts.py; here the question is
whether a registered statement reaches ``audit_forecasts`` with the right columns, aligned with the
actuals, and whether its result reaches every output like a fitted model's, while bad inputs stay
one model's error.  Expected line numbers are found by searching the document text, as in
tests/test_registry.py.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import pathlib
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml
from scipy import stats

import fitaudit.core.models.arima  # noqa: F401  (registers the 'arima' family)
from fitaudit.tasks.registry import (
    ForecastEntry,
    ModelEntry,
    entry_from_dict,
    parse_registry,
    registry_json_schema,
)

FILE = "registry.yaml"

HEAD = """\
version: 1
policy:
  replicates: 99
  seed: 7
  justification: "5 % per check with BH at q = 0.10"
  approved_by: "R. Example, Head of Model Risk"
sources:
  supplier:
    uri: data/supplier.parquet
    key: asset
    time: date
    value: energy
    exogenous: [temp_c]
    forecasts: [q05, q25, q50, q75, q95, fc_mean, fc_sd, issued_at, q99]
    frequency: D
models:
"""

GOOD = {
    "fq-good": """  - id: fq-good
    owner: Energy trading (supplier forecasts)
    tier: 2
    source: supplier
    series: good
    forecasts:
      quantiles: {"0.05": q05, "0.25": q25, "0.5": q50, "0.75": q75, "0.95": q95}
      issued: issued_at
      period: 7
    windows: {audit: 56}
""",
    "fm-good": """  - id: fm-good
    owner: Notebook team
    tier: 3
    source: supplier
    series: good
    forecasts: {mean: fc_mean, scale: fc_sd}
    windows: {audit: 56, history: 60}
""",
    "ft-good": """  - id: ft-good
    owner: Notebook team
    tier: 3
    source: supplier
    series: good
    forecasts: {mean: fc_mean, scale: fc_sd, noise: {law: student-t, df: 30}}
    windows: {audit: 56}
""",
    "fs-h2": """  - id: fs-h2
    owner: Notebook team
    tier: 3
    source: supplier
    series: good
    forecasts: {mean: fc_mean, scale: 1.5, horizon: 2}
    windows: {audit: 40}
""",
    "fc-counts": """  - id: fc-counts
    owner: Call centre
    tier: 3
    source: supplier
    series: counts
    forecasts: {mean: fc_mean, noise: {law: negative-binomial, size: 1000}}
    windows: {audit: 56}
""",
    "fit-good": """  - id: fit-good
    owner: Fitted here
    tier: 2
    source: supplier
    series: good
    spec: {family: arima, order: [1, 0, 0]}
    noise: normal
    windows: {fit: 120, audit: 28}
""",
}

VALID = HEAD + "".join(GOOD.values())


def _line(text: str, needle: str, after: int = 0) -> int:
    for number, line in enumerate(text.splitlines(), start=1):
        if number > after and needle in line:
            return number
    raise AssertionError(f"{needle!r} not in the document")


# ------------------------------------------------------------------------------------------
# registry: each way of stating a predictive distribution
# ------------------------------------------------------------------------------------------
def test_each_kind_of_entry_parses():
    reg = parse_registry(VALID, FILE)
    assert reg.rejected == () and reg.source_problems == ()
    assert reg.sources["supplier"].forecasts[:3] == ("q05", "q25", "q50")
    kinds = {m.id: type(m) for m in reg.models}
    assert kinds == {**{k: ForecastEntry for k in GOOD if k != "fit-good"}, "fit-good": ModelEntry}
    fq = reg.model("fq-good")
    assert fq.forecasts.statement == "quantiles"
    assert fq.forecasts.levels() == {0.05: "q05", 0.25: "q25", 0.5: "q50", 0.75: "q75", 0.95: "q95"}
    assert fq.forecasts.columns()["issued"] == "issued_at" and fq.value == "energy"
    assert fq.describe() == "forecasts (quantiles 0.05..0.95), 1-step, period 7"
    assert (fq.audit_window, fq.staged_window, fq.exogenous) == (56, 112, ())
    fm = reg.model("fm-good")
    assert (fm.forecasts.statement, fm.forecasts.law(), fm.staged_window) == (
        "mean-scale",
        {"law": "normal", "shape": None},
        116,
    )
    assert fm.describe() == "forecasts (mean and scale, normal), 1-step"
    assert reg.model("ft-good").forecasts.law() == {"law": "student-t", "shape": 30.0}
    h2 = reg.model("fs-h2")
    assert (h2.forecasts.scale, h2.forecasts.horizon, h2.describe()) == (
        1.5,
        2,
        "forecasts (mean, normal with scale 1.5), 2-step",
    )
    counts = reg.model("fc-counts")
    assert (
        counts.forecasts.statement == "mean-count"
        and counts.describe() == "forecasts (mean, negative-binomial(1000)), 1-step"
    )
    assert fq.audit_settings(reg.policy).audit_window == 56
    for m in reg.models:
        assert entry_from_dict(json.loads(json.dumps(m.to_dict()))) == m  # through a batch file's JSON and back


def _with(entry: str) -> str:
    return HEAD + GOOD["fit-good"] + entry


BAD = "  - id: bad\n    owner: o\n    tier: 2\n    source: supplier\n    series: good\n"

ENTRY_CASES = [
    # (case, the entry's remaining lines, needle on the reported line, field, message pattern)
    (
        "one-level",
        '    forecasts:\n      quantiles: {"0.5": q50}\n    windows: {audit: 56}\n',
        "quantiles:",
        "models[1].forecasts.quantiles",
        r"state at least two quantile levels",
    ),
    (
        "level-out-of-range",
        '    forecasts:\n      quantiles: {"0.05": q05, "95": q95}\n    windows: {audit: 56}\n',
        "quantiles:",
        r"models[1].forecasts.quantiles.95",
        r"quantile level '95' is not a probability strictly between 0 and 1",
    ),
    (
        "level-unquoted",
        "    forecasts:\n      quantiles: {0.05: q05, 0.95: q95}\n    windows: {audit: 56}\n",
        "quantiles:",
        "models[1].forecasts.quantiles.<key>",
        r"keys must be text, got 0.05; quote the key",
    ),
    (
        "level-twice",
        '    forecasts:\n      quantiles: {"0.05": q05, "0.050": q25}\n    windows: {audit: 56}\n',
        "quantiles:",
        "models[1].forecasts.quantiles.0.050",
        r"is the level of '0.05' again",
    ),
    (
        "column-twice",
        '    forecasts:\n      quantiles: {"0.05": q05, "0.95": q05}\n    windows: {audit: 56}\n',
        "quantiles:",
        "models[1].forecasts.quantiles.0.95",
        r"column 'q05' is given for two levels",
    ),
    (
        "undeclared-column",
        '    forecasts:\n      quantiles: {"0.05": q5, "0.95": q95}\n    windows: {audit: 56}\n',
        "quantiles:",
        "models[1].forecasts.quantiles",
        r"column 'q5' is not declared by source 'supplier' \(did you mean 'q\d5'\?\); its forecast columns are 'q05'",
    ),
    (
        "no-statement",
        "    forecasts: {horizon: 1}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts",
        r"no predictive distribution stated: give 'quantiles'",
    ),
    (
        "two-statements",
        '    forecasts: {mean: fc_mean, scale: fc_sd, quantiles: {"0.05": q05, "0.95": q95}}\n    windows: {audit: '
        "56}\n",
        "forecasts:",
        "models[1].forecasts.mean",
        r"state each predictive distribution one way",
    ),
    (
        "scale-missing",
        "    forecasts: {mean: fc_mean}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts",
        r"a normal predictive law needs 'scale'",
    ),
    (
        "scale-not-positive",
        "    forecasts: {mean: fc_mean, scale: 0}\n    windows: {audit: 56}\n",
        "scale: 0",
        "models[1].forecasts.scale",
        r"expected a column name or a positive number, got 0",
    ),
    (
        "scale-for-counts",
        "    forecasts: {mean: fc_mean, scale: fc_sd, noise: poisson}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.scale",
        r"the poisson law takes no scale",
    ),
    (
        "t-without-df",
        "    forecasts: {mean: fc_mean, scale: fc_sd, noise: student-t}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.noise",
        r"a stated student-t law needs its df \(e\.g\. noise: \{law: student-t, df: 5\}\)",
    ),
    (
        "nb-without-size",
        "    forecasts: {mean: fc_mean, noise: negative-binomial}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.noise",
        r"a stated negative-binomial law needs its size",
    ),
    (
        "unknown-law",
        "    forecasts: {mean: fc_mean, scale: fc_sd, noise: gauss}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.noise",
        r"Unknown noise law 'gauss'",
    ),
    (
        "mean-is-target",
        "    forecasts: {mean: energy, scale: 2}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.mean",
        r"column 'energy' is the model's target",
    ),
    (
        "undeclared-issued",
        "    forecasts: {mean: fc_mean, scale: 2, issued: made_at}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.issued",
        r"column 'made_at' is not declared by source 'supplier'",
    ),
    (
        "window-too-short",
        "    forecasts: {mean: fc_mean, scale: 2, horizon: 3}\n    windows: {audit: 56}\n",
        "audit: 56",
        "models[1].windows.audit",
        r"each of the 3 interleaved subsequences of 3-step forecasts needs 20 observations, so give audit >= 60",
    ),
    (
        "fit-window",
        "    forecasts: {mean: fc_mean, scale: 2}\n    windows: {fit: 365, audit: 56}\n",
        "windows:",
        "models[1].windows.fit",
        r"a forecast entry has no fit window",
    ),
    (
        "spec-too",
        "    forecasts: {mean: fc_mean, scale: 2}\n    spec: {family: arima, order: [1, 0, 0]}\n    windows: {audit: "
        "56}\n",
        "spec:",
        "models[1].spec",
        r"a forecast entry has no 'spec': fitaudit audits the forecasts its source states and fits nothing",
    ),
    (
        "unknown-key",
        "    forecasts: {mean: fc_mean, scale: 2, horizn: 2}\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts.horizn",
        r"unknown key 'horizn' \(did you mean 'horizon'\?\); valid keys are 'mean', 'scale'",
    ),
    (
        "forecasts-not-a-mapping",
        "    forecasts: [q05, q95]\n    windows: {audit: 56}\n",
        "forecasts:",
        "models[1].forecasts",
        r"expected a mapping like \{quantiles: ",
    ),
]


@pytest.mark.parametrize("case, rest, needle, field, message", ENTRY_CASES, ids=[c[0] for c in ENTRY_CASES])
def test_forecast_entry_problem(case, rest, needle, field, message):
    text = _with(BAD + rest)
    reg = parse_registry(text, FILE)  # one broken entry never sinks the registry
    assert [m.id for m in reg.models] == ["fit-good"], case
    (rejected,) = reg.rejected
    matches = [p for p in rejected.problems if p.field == field and re.search(message, p.message)]
    assert matches, f"{case}: {[str(p) for p in rejected.problems]}"
    assert matches[0].line == _line(text, needle, after=rejected.line - 1)
    assert str(matches[0]).startswith(f"{FILE}:{matches[0].line}: {field}: ")


def test_a_model_entry_without_spec_is_told_about_forecasts():
    text = _with(BAD + "    noise: normal\n    windows: {fit: 100, audit: 28}\n")
    problems = [str(p) for p in parse_registry(text, FILE).rejected[0].problems]
    assert any(
        "models[1].spec: missing; a model fitaudit fits needs a spec" in p and "give a 'forecasts' block" in p
        for p in problems
    ), problems


@pytest.mark.parametrize(
    "old, new, message",
    [
        ("forecasts: [q05,", "forecasts: [energy, q05,", r"column 'energy' is already the source's value column"),
        ("forecasts: [q05,", "forecasts: [temp_c, q05,", r"column 'temp_c' is already an exogenous column"),
        ("forecasts: [q05,", "forecasts: [q05, q05,", r"column 'q05' is listed twice"),
    ],
)
def test_source_forecast_columns_have_one_role(old, new, message):
    text = VALID.replace(old, new, 1)
    reg = parse_registry(text, FILE)
    matches = [
        p
        for p in reg.source_problems
        if p.field.startswith("sources.supplier.forecasts") and re.search(message, p.message)
    ]
    assert matches, [str(p) for p in reg.source_problems]
    assert matches[0].line == _line(text, "forecasts: [")
    assert reg.models == ()  # every model of the dropped source is rejected


def test_json_schema_tells_the_two_kinds_apart():
    import jsonschema

    validator = jsonschema.Draft202012Validator(registry_json_schema())
    assert list(validator.iter_errors(json.loads(json.dumps(yaml.safe_load(VALID), default=str)))) == []
    for old, new, where in (
        ('"0.95": q95}', '"0.95": 3}', ["models", 0, "forecasts", "quantiles", "0.95"]),
        (
            "tier: 3\n    source: supplier\n    series: good\n    forecasts: {mean: fc_mean, scale: fc_sd}",
            "tier: 3\n    source: supplier\n    series: good\n    forecasts: {mean: fc_mean, scale: fc_sd, horizn: 2}",
            ["models", 1, "forecasts"],
        ),
        ("windows: {fit: 120, audit: 28}", "windows: {audit: 28}", ["models", 5, "windows"]),
    ):
        broken = json.loads(json.dumps(yaml.safe_load(VALID.replace(old, new, 1)), default=str))
        errors = list(validator.iter_errors(broken))
        # one error, in the kind the entry is (a forecast entry is never judged as a model entry)
        assert len(errors) == 1 and list(jsonschema.exceptions.best_match(errors).absolute_path) == where, new


# ------------------------------------------------------------------------------------------
# staging, audit, results, report: a small extract with every bad input beside good ones
# ------------------------------------------------------------------------------------------
AS_OF = dt.date(2026, 11, 30)
N = 150
LEVELS = {"q05": 0.05, "q25": 0.25, "q50": 0.5, "q75": 0.75, "q95": 0.95}
SD = 1.5

BAD_ENTRIES = {
    "fq-cross": ("cross", '{quantiles: {"0.05": q05, "0.25": q25, "0.5": q50, "0.75": q75, "0.95": q95}}'),
    "fq-late": ("late", '{quantiles: {"0.05": q05, "0.5": q50, "0.95": q95}, issued: issued_at}'),
    "fm-negsd": ("negsd", "{mean: fc_mean, scale: fc_sd}"),
    "fq-gap": ("gap", '{quantiles: {"0.05": q05, "0.5": q50, "0.95": q95}}'),
    "fq-missing": ("good", '{quantiles: {"0.05": q05, "0.5": q50, "0.99": q99}}'),
}


def _extract(path: pathlib.Path) -> dict[str, dict]:
    """The extract: actuals with the forecasts issued the evening before, per series."""
    rng = np.random.default_rng(20261130)
    days = np.datetime64(AS_OF.isoformat(), "D") - np.arange(N)[::-1]
    issued = days.astype("datetime64[s]") - np.timedelta64(6, "h")
    data = {}
    mu = 40 + np.cumsum(rng.normal(0, 0.4, N))
    base = {
        "energy": mu + rng.normal(0, SD, N),
        "fc_mean": mu,
        "fc_sd": np.full(N, SD),
        "issued_at": issued,
        "temp_c": rng.normal(20, 3, N),
    }
    base.update({c: mu + SD * stats.norm.ppf(lv) for c, lv in LEVELS.items()})
    base["fc_mean"][:20] = np.nan  # no forecasts stored before the history used: allowed
    data["good"] = base
    last = N - 1
    data["cross"] = {**base, "q25": base["q25"].copy()}
    data["cross"]["q25"][last - 3] = base["q50"][last - 3] + 1.0  # the 0.25 quantile above the median
    data["late"] = {**base, "issued_at": issued.copy()}
    data["late"]["issued_at"][last - 5] = days[last - 5].astype("datetime64[s]") + np.timedelta64(2, "h")
    data["negsd"] = {**base, "fc_sd": base["fc_sd"].copy()}
    data["negsd"]["fc_sd"][last - 7] = -0.5
    data["gap"] = {**base, "q95": base["q95"].copy()}
    data["gap"]["q95"][last - 10] = np.nan
    lam = 20 + 5 * np.sin(np.arange(N) / 5)
    data["counts"] = {**base, "energy": rng.poisson(lam).astype(float), "fc_mean": lam}
    columns = ["energy", "temp_c", "fc_mean", "fc_sd", *LEVELS]
    table = {"asset": [], "date": [], "issued_at": [], **{c: [] for c in columns}}
    for key, cols in data.items():
        table["asset"] += [key] * N
        table["date"].append(days)
        table["issued_at"].append(cols["issued_at"])
        for c in columns:
            table[c].append(cols[c])
    pq.write_table(
        pa.table(
            {
                "asset": table["asset"],
                "date": pa.array(np.concatenate(table["date"])),
                "issued_at": pa.array(np.concatenate(table["issued_at"])),
                **{c: np.concatenate(table[c]) for c in columns},
            }
        ),
        path,
    )
    return {k: {**v, "days": days} for k, v in data.items()}


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """The plain pipeline over the registry: staging, calibration, audit (spilled), fleet rules,
    records, results document, pages and Parquet rows."""
    from fitaudit.tasks.audit import (
        audit_batch_spilled,
        calibration_for,
        finalize,
        records,
        restore_outcomes,
        spill_path,
    )
    from fitaudit.tasks.batches import stage_inputs
    from fitaudit.tasks.outcomes import results_rows
    from fitaudit.tasks.registry import load_registry
    from fitaudit.tasks.report import render_run
    from fitaudit.tasks.results import build_results

    root = tmp_path_factory.mktemp("forecast-entries")
    (root / "data").mkdir()
    data = _extract(root / "data" / "supplier.parquet")
    bad = "".join(
        f"  - {{id: {mid}, owner: o, tier: 3, source: supplier, series: {series}, forecasts: {stated}, windows: "
        f"{{audit: 56}}}}\n"
        for mid, (series, stated) in BAD_ENTRIES.items()
    )
    (root / FILE).write_text(VALID + bad)
    reg = load_registry(root / FILE)
    staged = stage_inputs(reg, AS_OF, root / "work", batch_size=4)
    paths = [b.path for b in staged.batches]
    cache = calibration_for(paths, reg.policy)
    planned = {k for k in cache.tables if k[0] == "production"}
    light = [o for p in paths for o in audit_batch_spilled(p, reg.policy, cache)]
    final = finalize(light, reg.policy)
    full, start = [], 0
    for b in staged.batches:
        full += restore_outcomes(final[start : start + len(b.model_ids)], spill_path(b.path))
        start += len(b.model_ids)
    doc = build_results(
        as_of=AS_OF.isoformat(),
        registry={"path": FILE, "sha256": reg.sha256},
        policy=reg.policy.to_dict(),
        records=records(full, AS_OF.isoformat()),
        tool_version="test",
    )
    meta = {
        "run_id": "r",
        "started_utc": "s",
        "finished_utc": "f",
        "operator": "o",
        "tool_version": "t",
        "code_commit": "c",
        "prefect_version": "p",
    }
    return {
        "root": root,
        "data": data,
        "registry": reg,
        "staged": staged,
        "cache": cache,
        "planned": planned,
        "light": final,
        "doc": doc,
        "by_id": {m["id"]: m for m in doc["models"]},
        "pages": render_run(doc, meta),
        "rows": results_rows(doc),
    }


def test_every_model_gets_its_record(run):
    ids = {m.id for m in run["registry"].models}
    assert set(run["by_id"]) == ids and len(ids) == len(GOOD) + len(BAD_ENTRIES)
    verdicts = {k: m["verdict"] for k, m in run["by_id"].items()}
    assert all(verdicts[k] == "error" for k in BAD_ENTRIES), verdicts
    assert all(verdicts[k] in ("pass", "refit") for k in GOOD if k != "fit-good"), verdicts
    assert (
        run["by_id"]["fit-good"]["audit"]["refit"]["status"] == "ok"
    )  # the fitted model beside them is audited as before


def test_the_stated_columns_reach_the_core_audit_aligned_with_the_actuals(run):
    from fitaudit.core.forecasts import audit_forecasts

    reg, data = run["registry"], run["data"]["good"]
    for mid, kwargs in (
        ("fq-good", {"quantiles": {lv: data[c] for c, lv in LEVELS.items()}, "period": 7}),
        ("fm-good", {"mean": data["fc_mean"], "scale": data["fc_sd"]}),
        ("ft-good", {"mean": data["fc_mean"], "scale": data["fc_sd"], "noise": {"law": "student-t", "shape": 30.0}}),
        ("fs-h2", {"mean": data["fc_mean"], "scale": 1.5, "horizon": 2}),
    ):
        entry = reg.model(mid)
        n = entry.staged_window
        cut = {
            k: (
                {lv: a[-n:] for lv, a in v.items()}
                if isinstance(v, dict) and k == "quantiles"
                else (v[-n:] if isinstance(v, np.ndarray) else v)
            )
            for k, v in kwargs.items()
        }
        direct = audit_forecasts(
            data["energy"][-n:],
            settings=entry.audit_settings(reg.policy),
            label=f"model {mid!r} (source 'supplier', series 'good')",
            **cut,
        )
        record = run["by_id"][mid]["audit"]
        # source: fitaudit.core.forecasts.audit_forecasts on the arrays written to the extract (the last n rows)
        assert record["accuracy"] == json.loads(json.dumps(direct.to_dict()["accuracy"]))
        assert record["production"]["p_distribution"] == direct.production.p_distribution
        assert record["refit"] is None and record["spec"]["family"] == "forecasts"
        # the fleet rules re-decide the verdict on the light outcome: its reasons still speak of the whole window
        assert direct.reasons[0].split(":")[0] in run["by_id"][mid]["reasons"][0], (
            direct.reasons[0],
            run["by_id"][mid]["reasons"][0],
        )
        assert f"the {entry.audit_window} actuals of the audit window" in run["by_id"][mid]["reasons"][0]
    counts = run["by_id"]["fc-counts"]["audit"]
    assert counts["spec"]["statement"] == "mean-count" and counts["production"]["status"] == "ok"


def test_forecast_records_in_results_json_and_parquet(run):
    rec = run["by_id"]["fq-good"]
    assert rec["spec_text"] == "forecasts (quantiles 0.05..0.95), 1-step, period 7" and rec["spec"] == {}
    assert rec["forecasts"]["quantiles"] == {"0.05": "q05", "0.25": "q25", "0.5": "q50", "0.75": "q75", "0.95": "q95"}
    assert (
        rec["noise"] is None and run["by_id"]["fm-good"]["noise"] is None
    )  # quantiles state no law; fm-good's is the default
    assert run["by_id"]["ft-good"]["noise"] == {"law": "student-t", "shape": 30.0}
    assert {"mase", "crps", "crps_naive", "crps_skill"} <= set(rec["audit"]["accuracy"])
    assert rec["production_version"] is None and rec["candidates"] is None
    assert rec["lineage"]["forecast_columns"]["issued"] == "issued_at" and rec["lineage"]["history_window"] == 56
    assert "forecasts" not in run["by_id"]["fit-good"]  # fitted models' records keep their shape
    row = next(r for r in run["rows"] if r["model_id"] == "fq-good")
    assert row["production_status"] == "ok" and row["refit_status"] is None and row["refit_p_value"] is None
    assert row["spec"] == rec["spec_text"]
    pq.write_table(pa.Table.from_pylist(run["rows"]), run["root"] / "rows.parquet")  # the twin's rows are one table


@pytest.mark.parametrize(
    "model_id, pattern",
    [
        (
            "fq-missing",
            r"model 'fq-missing': source 'supplier', series 'good': column 'q99' is in none of the files; .* Fix: ",
        ),
        (
            "fq-cross",
            r"model 'fq-cross' \(source 'supplier', series 'cross'\).*the stated quantiles cross at 1 "
            r"observation\(s\).*the 0\.5 quantile .* is below the 0\.25 quantile .*correct the forecast store",
        ),
        (
            "fm-negsd",
            r"model 'fm-negsd' \(source 'supplier', series 'negsd'\).*the predictive scale must be positive, but 1 "
            r"value\(s\) are not.*Correct the forecast store",
        ),
        (
            "fq-late",
            r"model 'fq-late' \(source 'supplier', series 'late'\), column 'issued_at': 1 forecast\(s\) were issued at "
            r"or after the observation they predict, first the forecast for 2026-11-25T00:00:00 issued at "
            r"2026-11-25T02:00:00",
        ),
        (
            "fq-gap",
            r"model 'fq-gap': source 'supplier', series 'gap': column 'q95' \(the quantile 0\.95\) has no forecast for "
            r"1 of the 56 observations of the audit window, first 2026-11-20T00:00:00.*Fix: ",
        ),
    ],
)
def test_bad_forecasts_are_that_models_error(run, model_id, pattern):
    rec = run["by_id"][model_id]
    assert rec["verdict"] == "error"
    assert any(re.search(pattern, r) for r in rec["reasons"]), rec["reasons"]
    if model_id == "fq-late":
        assert (
            rec["reasons"][0]
            == "model 'fq-late': forecasts issued after the observation they predict cannot be audited."
        )


def test_the_forecast_tables_are_built_before_the_audits(run):
    used = {k for k in run["cache"].tables if k[0] == "production"}
    # no distribution-gate table was built during the audits: the window (56, 40 for the others) and
    # the 2-step subsequences (20) were planned from the batch metadata
    assert used == run["planned"]
    assert {k[1] for k in used} == {"n=56", "n=20"}


def test_light_outcomes_of_forecast_audits(run):
    from fitaudit.tasks.audit import light_outcome, wants_candidates

    light = {o.model_id: o for o in run["light"]}
    assert light["fq-good"].result.refit is None and light["fq-good"].result.production.map is None
    again = light_outcome(light["fq-good"])  # idempotent on a result without a refit check
    assert again.result.production.p_value == light["fq-good"].result.production.p_value
    respecify = dataclasses.replace(
        light["fq-good"], verdict="respecify", result=dataclasses.replace(light["fq-good"].result, verdict="respecify")
    )
    assert not wants_candidates(respecify)  # no candidate search for forecasts made elsewhere
    assert wants_candidates(
        dataclasses.replace(light["fit-good"], verdict="respecify")
    )  # a fitted model's respecify does


def test_candidate_search_skips_forecast_entries(run):
    from fitaudit.tasks.audit import candidate_tables, candidates_for

    batch = next(b for b in run["staged"].batches if "fq-good" in b.model_ids)
    assert candidates_for(batch.path, ["fq-good"], run["registry"].policy, run["cache"]) == {}
    assert candidate_tables([[batch.path, ["fq-good"]]], run["registry"].policy) == []


def test_the_model_page_says_the_model_was_not_refitted(run):
    from fitaudit.tasks.report import NOT_REFITTED_PAGE

    page = run["pages"]["models/fq-good.html"].decode()
    assert NOT_REFITTED_PAGE in page
    assert '<h2 id="checks-h">Forecast check</h2>' in page and ">Refit check</th>" not in page
    assert 'id="accuracy"' in page and "Mean absolute scaled error (MASE)" in page and "CRPS skill" in page
    mase = run["by_id"]["fq-good"]["audit"]["accuracy"]["mase"]
    assert f"<td>{mase:.3f}: mean absolute error" in page  # three significant figures of a MASE below 1
    assert "Stated predictive law</th><td>predictive quantiles at levels 0.05, 0.25, 0.5, 0.75, 0.95" in page
    assert "No candidate search for forecasts made elsewhere" in page
    error_page = run["pages"]["models/fq-missing.html"].decode()
    assert NOT_REFITTED_PAGE in error_page and "column &#39;q99&#39; is in none of the files" in error_page
    fitted = run["pages"]["models/fit-good.html"].decode()
    assert NOT_REFITTED_PAGE not in fitted and '<h2 id="checks-h">Production check and refit check</h2>' in fitted


def test_the_owner_of_failing_forecasts_is_asked_to_re_estimate(run):
    from fitaudit.tasks.report import FORECAST_ACTIONS, record_action

    policy = run["doc"]["run"]["policy"]
    for verdict in ("refit", "respecify"):
        action = record_action(dict(run["by_id"]["fq-good"], verdict=verdict), policy, AS_OF.isoformat())
        assert (
            action["action"] == FORECAST_ACTIONS[verdict] and action["due"] == "2026-12-14"
        )  # tier 2: 14 days by default
    assert "Re-estimate the model that issues these forecasts" in FORECAST_ACTIONS["refit"]
    fitted = record_action(dict(run["by_id"]["fit-good"], verdict="refit"), policy, AS_OF.isoformat())
    assert "approve their promotion" in fitted["action"]  # a fitted model's refit is promoted, as before


def test_verdict_events_name_the_entry_kind(run, monkeypatch):
    from fitaudit.tasks import events
    from fitaudit.tasks.outcomes import light_record

    sent = []
    monkeypatch.setattr(events, "emit_event", lambda **kw: sent.append(kw))
    recs = [light_record(m) for m in run["doc"]["models"]]
    assert events.emit_verdict_events(recs, {"run_id": "r1", "as_of": AS_OF.isoformat()}) == len(recs)
    kinds = {e["payload"]["model_id"]: e["resource"][events.ENTRY_LABEL] for e in sent}
    assert kinds["fq-good"] == "forecasts" and kinds["fit-good"] == "model"
    assert all(e["payload"]["entry"] == kinds[e["payload"]["model_id"]] for e in sent)
    # an automation can tell them apart: Prefect matches the label like any resource label
    from prefect.events.schemas.events import Resource, ResourceSpecification

    fitted_only = ResourceSpecification({"prefect.resource.id": "fitaudit.model.*", events.ENTRY_LABEL: "model"})
    assert [
        fitted_only.matches(Resource(e["resource"]))
        for e in sent
        if e["payload"]["model_id"] in ("fit-good", "fq-good")
    ] == [True, False]


def test_refits_refuse_forecast_entries(run):
    from fitaudit.tasks.outcomes import light_record
    from fitaudit.tasks.refit import NotRefittableError, refit_targets, refuse_forecast_entries

    reg = run["registry"]
    with pytest.raises(
        NotRefittableError,
        match=(
            r"'fq-good' is a forecast entry: fitaudit audits the forecasts its owner states and holds no model to "
            r"refit.*the owner should re-estimate the model that issues them.*Nothing was refitted; refit the other "
            r"models alone \('fit-good'\)"
        ),
    ):
        refuse_forecast_entries(reg, ["fq-good", "fit-good"])
    refuse_forecast_entries(reg, ["fit-good"])  # fitted models go ahead
    recs = [dict(light_record(m), verdict="refit") for m in run["doc"]["models"]]
    assert refit_targets(recs) == ["fit-good"]


# ------------------------------------------------------------------------------------------
# the flows, on the demo: forecasts from outside beside fitted models
# ------------------------------------------------------------------------------------------
FLOW_MODELS = ["supplier-pump-01", "supplier-pump-02", "notebook-leak-01", "energy-pump-01", "demand-d-31"]


@pytest.fixture(scope="module")
def flow_run(prefect_server, tmp_path_factory):
    from fitaudit.demo import DEMO_AS_OF, write_demo
    from fitaudit.flows.audit import audit_flow
    from fitaudit.tasks import events

    demo = write_demo(tmp_path_factory.mktemp("forecast-flow"))
    sent = []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(events, "emit_event", lambda **kw: sent.append(kw))
        run = audit_flow(
            registry=demo["registry"],
            as_of=DEMO_AS_OF,
            archive=demo["archive"],
            models=FLOW_MODELS,
            batch_size=2,
            trigger_refits=True,
            search_candidates=True,
        )
    return {"demo": demo, "run": run, "events": sent, "folder": pathlib.Path(run["report"]).parent}


@pytest.mark.server
def test_the_audit_flow_publishes_forecast_entries_like_any_model(flow_run):
    from fitaudit.tasks.archive import verify_archive
    from fitaudit.tasks.frames import load_results

    folder, run = flow_run["folder"], flow_run["run"]
    doc = json.loads((folder / "results.json").read_text())
    verdicts = {m["id"]: m["verdict"] for m in doc["models"]}
    # the demo plants pump-02's narrow quantiles (refit: the owner re-estimates) and d-31's missing reading
    assert verdicts == {
        "supplier-pump-01": "pass",
        "supplier-pump-02": "refit",
        "notebook-leak-01": "pass",
        "energy-pump-01": "pass",
        "demand-d-31": "error",
    }
    rec = next(m for m in doc["models"] if m["id"] == "supplier-pump-02")
    assert (
        rec["audit"]["refit"] is None
        and rec["audit"]["accuracy"]["crps_skill"] is not None
        and rec["candidates"] is None
    )
    assert run["refits"] is None  # --refit leaves forecast entries to their owners (and no fitted model needed one)
    frames = load_results(folder)
    checks = frames.checks.query("model_id == 'supplier-pump-02'")
    assert list(checks["check"]) == ["production"]  # the forecast check; no refit check was attempted
    assert frames.verdicts.set_index("model_id").loc["supplier-pump-02", "verdict"] == "refit"
    page = (folder / "models" / "supplier-pump-02.html").read_text()
    assert (
        "This model was not refitted by fitaudit; its forecasts were audited against their stated uncertainty." in page
    )
    assert "Check the refitted parameters" not in page  # nothing was refitted, so nothing is to be promoted
    parquet = {r["model_id"]: r for r in pq.read_table(folder / "results.parquet").to_pylist()}
    assert parquet["supplier-pump-02"]["verdict"] == "refit" and parquet["supplier-pump-02"]["refit_status"] is None
    assert not [p for p in verify_archive(run["archive"]) if not p.is_note]  # in the archive's chain like any run
    kinds = {
        e["payload"]["model_id"]: (e["event"], e["resource"]["fitaudit.entry"])
        for e in flow_run["events"]
        if "model_id" in e["payload"]
    }
    assert kinds["supplier-pump-02"] == ("fitaudit.model.refit", "forecasts")
    assert kinds["energy-pump-01"] == ("fitaudit.model.pass", "model")


@pytest.mark.server
def test_fitaudit_refit_refuses_a_forecast_entry(flow_run, capsys):
    from fitaudit.demo import DEMO_AS_OF
    from fitaudit.flows.cli import EXIT_ERROR, main
    from fitaudit.flows.refit import refit_flow
    from fitaudit.tasks.refit import NotRefittableError

    demo = flow_run["demo"]
    runs = sorted((pathlib.Path(demo["archive"]) / "runs").rglob("manifest.json"))
    with pytest.raises(NotRefittableError, match=r"'supplier-pump-02' is a forecast entry"):
        refit_flow(registry=demo["registry"], model_ids=["supplier-pump-02"], archive=demo["archive"], as_of=DEMO_AS_OF)
    code = main(
        [
            "refit",
            demo["registry"],
            "--model",
            "supplier-pump-02",
            "--archive",
            demo["archive"],
            "--as-of",
            DEMO_AS_OF.isoformat(),
        ]
    )
    err = capsys.readouterr().err
    assert code == EXIT_ERROR and "fitaudit refit:" in err and "'supplier-pump-02' is a forecast entry" in err
    assert "the owner should re-estimate the model that issues them" in err
    assert sorted((pathlib.Path(demo["archive"]) / "runs").rglob("manifest.json")) == runs  # nothing was written
