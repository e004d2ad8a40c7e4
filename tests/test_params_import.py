"""Onboarding production parameters estimated elsewhere (fitaudit.tasks.params.import_params and
``fitaudit params import``).

The outside reference is statsmodels (test-only): an ARIMA(1,0,1) with a constant estimated on
the first 70 years of its packaged Nile data (annual flow of the Nile at Aswan, 1871-1970), whose
parameters are imported and then audited on the following 30 years.
"""

from __future__ import annotations

import json
import math
import warnings

import numpy as np
import pytest
import yaml

from fitaudit.core.audit import AuditSettings, audit_series, score_frozen
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.models import Arima
from fitaudit.core.noise import get_law
from fitaudit.flows.cli import EXIT_OK, EXIT_USAGE, main
from fitaudit.tasks.params import (
    ParameterStoreError,
    ParamsFileError,
    import_params,
    list_versions,
    production_version,
    verify_params,
)

sm_arima = pytest.importorskip("statsmodels.tsa.arima.model")
sm_datasets = pytest.importorskip("statsmodels.datasets")

REGISTRY = """\
version: 1
policy:
  level: 0.05
  seed: 7
  justification: "5% per check with BH at q = 0.10"
  approved_by: "R. Example, Head of Model Risk"
sources:
  rivers:
    uri: data/rivers.parquet
    key: river
    time: year
    value: flow
    frequency: D  # fitaudit has no annual frequency; the import reads no extract, so it is not used here
models:
  - id: nile-flow
    owner: Hydrology team
    tier: 2
    source: rivers
    series: nile
    spec: {family: arima, order: [1, 0, 1], trend: c}
    noise: normal
    windows: {fit: 70, audit: 30}
  - id: nile-flow-t
    owner: Hydrology team
    tier: 2
    source: rivers
    series: nile
    spec: {family: arima, order: [1, 0, 1], trend: c}
    noise: student-t
    windows: {fit: 70, audit: 30}
"""


@pytest.fixture(scope="module")
def nile() -> np.ndarray:
    # source: statsmodels.datasets.nile (Cobb 1978; 100 annual volumes, 1871-1970)
    return sm_datasets.nile.load_pandas().data["volume"].to_numpy(dtype=float)


@pytest.fixture(scope="module")
def statsmodels_fit(nile):
    """ARIMA(1,0,1) with a constant by statsmodels' exact maximum likelihood on 1871-1940."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = sm_arima.ARIMA(nile[:70], order=(1, 0, 1), trend="c").fit()
    p = dict(zip(res.model.param_names, res.params))
    # statsmodels' names -> fitaudit's (same sign conventions: AR 1 - phi B, MA 1 + theta B)
    return {"ar1": p["ar.L1"], "ma1": p["ma.L1"], "intercept": p["const"], "sigma2": p["sigma2"]}, res


@pytest.fixture()
def registry(tmp_path):
    path = tmp_path / "registry.yaml"
    path.write_text(REGISTRY, encoding="utf-8")
    return path


def _params_file(tmp_path, params, name="nile.yaml", **extra):
    doc = {
        "model_id": "nile-flow",
        "family": "arima",
        "params": params,
        "date": "1940-12-31",
        "approved_by": "A. Hydrologist, model owner",
    }
    doc.update(extra)
    path = tmp_path / name
    if name.endswith(".json"):
        path.write_text(json.dumps(doc), encoding="utf-8")
    else:
        path.write_text(yaml.safe_dump(doc, sort_keys=False), encoding="utf-8")
    return path


def test_imported_statsmodels_parameters_are_the_production_version(tmp_path, registry, statsmodels_fit):
    params, _ = statsmodels_fit
    path = _params_file(tmp_path, {k: float(v) for k, v in params.items()}, source="statsmodels ARIMA, 1871-1940")
    archive = tmp_path / "archive"
    promoted = import_params(registry, "nile-flow", path, by="B. Analyst, forecasting", archive_root=archive)
    assert production_version(archive, "nile-flow") == promoted
    assert promoted.params == {k: float(v) for k, v in params.items()}  # stored as given
    assert promoted.noise == {"law": "normal", "shape": None}
    assert promoted.created_by == "A. Hydrologist, model owner"  # the file's approver approves the promotion
    candidate = list_versions(archive, "nile-flow")[0]
    assert (candidate.status, candidate.created_by, promoted.promotes) == ("candidate", "B. Analyst, forecasting", 1)
    assert candidate.lineage["in_production_since"] == "1940-12-31" and len(candidate.lineage["file_sha256"]) == 64
    assert verify_params(archive) == []
    chain = [json.loads(line) for line in (archive / "chain.jsonl").read_text().splitlines()]
    assert chain[-1]["kind"] == "promotion" and chain[-1]["payload"]["imported_by"] == "B. Analyst, forecasting"


def test_production_check_of_imported_parameters_equals_a_run_of_fitaudits_errors(
    tmp_path, registry, nile, statsmodels_fit
):
    """The production check on 1941-1970 of the imported parameters is the score of
    Arima.errors with those parameters, and those errors are statsmodels' own one-step errors."""
    params, res = statsmodels_fit
    path = _params_file(tmp_path, {k: float(v) for k, v in params.items()})
    archive = tmp_path / "archive"
    stored = import_params(registry, "nile-flow", path, by="B. Analyst", archive_root=archive).params
    spec = Arima(order=(1, 0, 1), trend="c")
    settings = AuditSettings(audit_window=30, replicates=199, locate_change=False)
    cache = CalibrationCache()
    audited = audit_series(
        nile, spec, noise="normal", production=stored, settings=settings, cache=cache, label="nile-flow"
    ).production
    assert audited.ok, audited.message

    errors = spec.errors(nile, stored)
    tail = errors[-30:]
    law = get_law("normal")
    nparams = law.from_variance(stored["sigma2"])
    direct = score_frozen(tail, law.cdf(tail, nparams), law, nparams, 1, settings, cache, audited.window)
    assert audited.counts == direct.counts
    assert audited.p_distribution == direct.p_distribution
    assert audited.p_independence == direct.p_independence
    assert audited.p_value == direct.p_value

    # source: statsmodels' Kalman filter at the same parameters; its standardised one-step forecast
    # errors times sqrt(sigma2) are fitaudit's errors (exact initialisation in both)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        filtered = sm_arima.ARIMA(nile, order=(1, 0, 1), trend="c").filter(res.params)
    reference = filtered.filter_results.standardized_forecasts_error[0] * math.sqrt(stored["sigma2"])
    np.testing.assert_allclose(errors, reference, rtol=1e-8, atol=1e-6)


def test_json_file_with_a_student_t_shape(tmp_path, registry, statsmodels_fit):
    params, _ = statsmodels_fit
    path = _params_file(
        tmp_path,
        {k: float(v) for k, v in params.items()},
        name="nile.json",
        model_id="nile-flow-t",
        noise={"law": "student-t", "df": 6},
    )
    promoted = import_params(registry, "nile-flow-t", path, by="B. Analyst", archive_root=tmp_path / "a")
    assert promoted.noise == {"law": "student-t", "shape": 6.0}


@pytest.mark.parametrize(
    "change, model, words",
    [
        (
            {"params": {"ar1": 0.5, "theta1": -0.2, "intercept": 900.0, "sigma2": 2e4}},
            "nile-flow",
            ["missing ma1", "unexpected theta1", "Expected exactly: ar1, ma1, intercept, sigma2"],
        ),
        (
            {"params": {"ar1": 1.2, "ma1": -0.2, "intercept": 900.0, "sigma2": 2e4}},
            "nile-flow",
            ["not stationary", "1 - ar1 B"],
        ),
        ({"params": {"ar1": 0.5, "ma1": -1.5, "intercept": 900.0, "sigma2": 2e4}}, "nile-flow", ["not invertible"]),
        (
            {"params": {"ar1": 0.5, "ma1": -0.2, "intercept": 900.0, "sigma2": 0.0}},
            "nile-flow",
            ["sigma2 = 0", "positive variance"],
        ),
        (
            {"params": {"ar1": 0.5, "ma1": -0.2, "intercept": 900.0, "sigma2": True}},
            "nile-flow",
            ["params.sigma2", "expected a number"],
        ),
        ({"approved_by": "  "}, "nile-flow", ["approved_by", "non-blank"]),
        ({"date": "last spring"}, "nile-flow", ["date"]),
        ({"reviewer": "X"}, "nile-flow", ["reviewer", "unknown field", "approved_by"]),
        ({"noise": {"law": "laplace"}}, "nile-flow", ["registered with the 'normal' noise law", "states 'laplace'"]),
        ({"noise": {"law": "normal", "df": 5}}, "nile-flow", ["has no shape"]),
        ({"model_id": "thames-flow"}, "nile-flow", ["is for model 'thames-flow'"]),
        ({"family": "smoothing"}, "nile-flow", ["'smoothing' parameters", "registered as 'arima'"]),
        ({"model_id": "nile-flow-t"}, "nile-flow-t", ["estimates the student-t shape", "df"]),
        ({"model_id": "nile-flow-t", "noise": {"df": 1.5}}, "nile-flow-t", ["> 2"]),
    ],
)
def test_bad_files_are_refused_with_the_fix_and_nothing_is_written(tmp_path, registry, change, model, words):
    doc = {"params": {"ar1": 0.5, "ma1": -0.2, "intercept": 900.0, "sigma2": 2e4}}
    doc.update(change)
    path = _params_file(tmp_path, doc.pop("params"), **doc)
    archive = tmp_path / "archive"
    with pytest.raises(ParamsFileError) as exc:
        import_params(registry, model, path, by="B. Analyst", archive_root=archive)
    for w in words:
        assert w in str(exc.value), (w, str(exc.value))
    assert not (archive / "params").exists()


def test_unknown_model_and_unreadable_file(tmp_path, registry):
    with pytest.raises(ParameterStoreError, match="no model 'thames'.*'nile-flow'"):
        import_params(registry, "thames", tmp_path / "x.yaml", by="B", archive_root=tmp_path)
    with pytest.raises(ParamsFileError, match="cannot be read"):
        import_params(registry, "nile-flow", tmp_path / "missing.yaml", by="B", archive_root=tmp_path)
    broken = tmp_path / "broken.json"
    broken.write_text("{params: ", encoding="utf-8")
    with pytest.raises(ParamsFileError, match="not valid JSON"):
        import_params(registry, "nile-flow", broken, by="B", archive_root=tmp_path)


def test_command_line(tmp_path, registry, statsmodels_fit, capsys):
    params, _ = statsmodels_fit
    good = _params_file(tmp_path, {k: float(v) for k, v in params.items()})
    archive = tmp_path / "archive"
    code = main(
        ["params", "import", str(registry), "nile-flow", str(good), "--by", "B. Analyst", "--archive", str(archive)]
    )
    assert code == EXIT_OK
    assert "in production as version 2" in capsys.readouterr().out
    bad = _params_file(tmp_path, {"ar1": 0.5}, name="bad.yaml")
    code = main(
        ["params", "import", str(registry), "nile-flow", str(bad), "--by", "B. Analyst", "--archive", str(archive)]
    )
    assert code == EXIT_USAGE
    assert "missing ma1, intercept, sigma2" in capsys.readouterr().err
    assert len(list_versions(archive, "nile-flow")) == 2  # the refused file wrote nothing
