"""Registry parsing and validation (fitaudit.tasks.registry).

Expected line numbers are found by searching the document text for the offending line, so each
case checks that the problem points at the line a person would edit; the messages are checked
for the field, what was wrong and what would be valid.
"""

from __future__ import annotations

import hashlib
import json
import pathlib
import re

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import fitaudit.core.models.arima  # noqa: F401  (registers the 'arima' family)
from fitaudit.tasks._io import canonical_json
from fitaudit.tasks.registry import (
    FREQUENCIES,
    SAFE_ID,
    ModelEntry,
    Registry,
    RegistryError,
    RegistryProblem,
    RejectedEntry,
    check_registry,
    entry_from_dict,
    load_registry,
    parse_registry,
    registry_json_schema,
)

VALID = """\
version: 1
policy:
  level: 0.05
  multiple_testing: bh
  fdr_q: 0.10
  persistence: {k: 2, n: 3}
  calibration: simulated
  replicates: 999
  seed: 20261201
  refit_policy: approval
  justification: "5% per check with BH at q = 0.10 bounds false flags across the fleet"
  approved_by: "R. Example, Head of Model Risk"
sources:
  demand:
    uri: data/demand.parquet
    key: district
    time: date
    value: demand
    exogenous: [temp_c, rain_mm]
    frequency: D
    partitioning: null
models:
  - id: north-demand
    owner: Forecasting team
    tier: 2
    description: District north daily demand
    source: demand
    series: north
    exogenous: [temp_c]
    spec: {family: arima, order: [1, 0, 1], seasonal: [0, 1, 1, 7], trend: n}
    noise: {law: student-t, df: 5}
    windows: {fit: 730, audit: 28}
    settings: {replicates: 499, calibration: bootstrap}
    last_validated: 2026-06-30
  - id: south-demand
    owner: Forecasting team
    tier: 1
    source: demand
    series: south
    spec: {family: arima, order: [0, 1, 1]}
    noise: normal
    windows: {fit: 365, audit: 28}
"""

FILE = "registry.yaml"


def _line(text: str, needle: str, after: int = 0) -> int:
    """1-based number of the first line after line ``after`` containing ``needle``."""
    for number, line in enumerate(text.splitlines(), start=1):
        if number > after and needle in line:
            return number
    raise AssertionError(f"{needle!r} not in the document")


def _edit(old: str, new: str, text: str = VALID) -> str:
    assert old in text, old
    return text.replace(old, new, 1)


# ------------------------------------------------------------------------------------------
# a full valid document
# ------------------------------------------------------------------------------------------
def test_full_document_parses_every_field():
    reg = parse_registry(VALID, FILE, base_dir="/srv/audit")
    assert isinstance(reg, Registry)
    assert reg.version == 1 and reg.rejected == () and reg.source_problems == ()
    assert reg.base_dir == "/srv/audit"
    p = reg.policy
    assert (p.level, p.multiple_testing, p.fdr_q, p.persistence_k, p.persistence_n) == (0.05, "bh", 0.10, 2, 3)
    assert (p.calibration, p.replicates, p.seed, p.refit_policy) == ("simulated", 999, 20261201, "approval")
    assert p.approved_by == "R. Example, Head of Model Risk" and p.justification.startswith("5% per check")
    src = reg.sources["demand"]
    assert (src.uri, src.key, src.time, src.value, src.frequency, src.partitioning) == (
        "data/demand.parquet",
        "district",
        "date",
        "demand",
        "D",
        None,
    )
    assert src.exogenous == ("temp_c", "rain_mm")
    north = reg.model("north-demand")
    assert isinstance(north, ModelEntry)
    assert (north.owner, north.tier, north.source, north.series, north.value) == (
        "Forecasting team",
        2,
        "demand",
        "north",
        "demand",
    )
    assert north.exogenous == ("temp_c",)
    assert north.spec == {"family": "arima", "order": (1, 0, 1), "seasonal": (0, 1, 1, 7), "trend": "n"}
    assert north.noise_law() == {"law": "student-t", "shape": 5.0}
    assert (north.fit_window, north.audit_window) == (730, 28)
    assert north.settings.to_dict() == {"replicates": 499, "calibration": "bootstrap"}
    assert north.last_validated == "2026-06-30"
    assert north.line == _line(VALID, "- id: north-demand")
    south = reg.model("south-demand")
    assert (
        south.noise_law() == {"law": "normal", "shape": None}
        and south.settings.to_dict() == {}
        and south.last_validated is None
    )
    assert south.description == "" and south.exogenous == ()


def test_spec_feeds_model_from_dict():
    from fitaudit.core.models import model_from_dict

    reg = parse_registry(VALID, FILE)
    model = model_from_dict(reg.model("north-demand").spec)
    assert model.order == (1, 0, 1) and model.seasonal == (0, 1, 1, 7)


def test_hash_and_to_dict(tmp_path):
    path = tmp_path / FILE
    path.write_text(VALID, encoding="utf-8")
    reg = load_registry(path)
    assert reg.sha256 == hashlib.sha256(VALID.encode("utf-8")).hexdigest()  # source: hashlib
    assert reg.base_dir == str(tmp_path)
    round_trip = json.loads(canonical_json(reg.to_dict()))
    assert round_trip["models"][0]["spec"]["order"] == [1, 0, 1]
    assert round_trip["policy"]["persistence"] == {"k": 2, "n": 3}
    assert check_registry(path) == []


def test_the_same_bytes_give_the_registry_parsed_last_and_a_holiday_file_is_read_each_time(tmp_path, monkeypatch):
    """tasks/registry/loader.py: the flow's load-registry task takes the registry `fitaudit run`
    checked, without a second parse; other bytes or another name parse afresh."""
    path = tmp_path / FILE
    path.write_text(VALID, encoding="utf-8")
    first = load_registry(path)
    assert load_registry(path) is first
    path.write_text(VALID + "\n# edited\n", encoding="utf-8")
    edited = load_registry(path)
    assert edited is not first and edited.sha256 != first.sha256
    monkeypatch.chdir(tmp_path)
    relative = load_registry(FILE)  # the same file under another name, which its messages use
    assert relative is not edited and relative.path == FILE
    text, _ = _holiday_registry(tmp_path, "B", "2026-12-25\n")
    path.write_text(text, encoding="utf-8")
    with_holidays = load_registry(path)
    assert with_holidays.sources["demand"].holidays == ("2026-12-25",)
    (tmp_path / "holidays.txt").write_text("2026-12-25\n2026-12-28\n", encoding="utf-8")
    assert load_registry(path).sources["demand"].holidays == ("2026-12-25", "2026-12-28")  # the file read again


def test_policy_defaults_apply_when_keys_are_omitted():
    text = VALID
    for line in (
        "  level: 0.05\n",
        "  multiple_testing: bh\n",
        "  fdr_q: 0.10\n",
        "  persistence: {k: 2, n: 3}\n",
        "  calibration: simulated\n",
        "  replicates: 999\n",
        "  seed: 20261201\n",
        "  refit_policy: approval\n",
    ):
        text = _edit(line, "", text)
    p = parse_registry(text, FILE).policy
    assert (p.level, p.multiple_testing, p.fdr_q, p.persistence_k, p.persistence_n) == (0.05, "bh", 0.10, 2, 3)
    assert (p.calibration, p.replicates, p.seed, p.refit_policy) == ("simulated", 999, 0, "approval")


def test_model_lookup_errors_say_why():
    reg = parse_registry(
        _edit(
            "  - id: south-demand\n    owner: Forecasting team\n    tier: 1",
            "  - id: south-demand\n    owner: Forecasting team\n    tier: 9",
        ),
        FILE,
    )
    with pytest.raises(KeyError, match="'south-demand' was rejected.*tier"):
        reg.model("south-demand")
    with pytest.raises(KeyError, match="no model 'west'.*'north-demand'"):
        reg.model("west")


def test_problem_string_shape():
    assert (
        str(RegistryProblem("registry.yaml", 14, "models[2].spec.order", "bad"))
        == "registry.yaml:14: models[2].spec.order: bad"
    )
    assert str(RegistryProblem("r.yaml", None, "", "cannot read")) == "r.yaml: cannot read"


def test_safe_id_pattern():
    for good in ("north-demand", "a", "A1.b_c-d", "9" * 128):
        assert SAFE_ID.match(good)
    for bad in ("", "-x", ".hidden", "../x", "a/b", "a b", "x\n", "é", "9" * 129, "a\u202eb", "a\x00b"):
        assert not SAFE_ID.match(bad), bad


def test_frequency_set_is_documented():
    # source: pandas >= 2.2 offset aliases (h, min, B, W-MON ... W-SUN, MS, ME, QS, QE, YS, YE)
    weekly = {f"W-{d}" for d in ("MON", "TUE", "WED", "THU", "FRI", "SAT", "SUN")}
    assert set(FREQUENCIES) == {"15min", "30min", "h", "D", "B", "W", "MS", "ME", "QS", "QE", "YS", "YE"} | weekly


@pytest.mark.parametrize(
    "old, new", [("H", "h"), ("M", "ME"), ("Q", "QE"), ("A", "YE"), ("YS", "YS"), ("W-FRI", "W-FRI")]
)
def test_old_frequency_spellings_read_as_todays(old, new):
    # source: pandas 2.2 release notes (H, M, Q, A deprecated for h, ME, QE, YE)
    reg = parse_registry(_edit("frequency: D", f"frequency: {old}"), FILE)
    assert reg.source_problems == ()
    assert reg.sources["demand"].frequency == new
    assert reg.sources["demand"].to_dict()["frequency"] == new


def test_business_day_holidays():
    text = _edit("frequency: D", "frequency: B\n    holidays: [2026-12-25, 2026-01-01, '2026-12-26']")
    reg = parse_registry(text, FILE)
    assert reg.source_problems == ()
    assert reg.sources["demand"].holidays == ("2026-01-01", "2026-12-25", "2026-12-26")
    assert reg.sources["demand"].to_dict()["holidays"] == ["2026-01-01", "2026-12-25", "2026-12-26"]
    assert "holidays" not in parse_registry(VALID, FILE).sources["demand"].to_dict()


def test_dated_uri_and_row_filter():
    import datetime as dt

    text = _edit("uri: data/demand.parquet", "uri: 'exports/{as_of:%Y-%m-%d}/demand.parquet'")
    text = _edit(
        "    partitioning: null\n", "    partitioning: null\n    filter: [[region, in, [n, s]], [x, '>=', 3]]\n", text
    )
    reg = parse_registry(text, FILE)
    assert reg.source_problems == ()
    source = reg.sources["demand"]
    assert source.for_as_of(dt.date(2026, 12, 3)).uri == "exports/2026-12-03/demand.parquet"
    assert parse_registry(VALID, FILE).sources["demand"].for_as_of(dt.date(2026, 12, 3)).uri == "data/demand.parquet"
    assert source.filter == (("region", "in", ("n", "s")), ("x", ">=", 3))
    assert source.to_dict()["filter"] == [["region", "in", ["n", "s"]], ["x", ">=", 3]]
    assert "filter" not in parse_registry(VALID, FILE).sources["demand"].to_dict()


@pytest.mark.parametrize(
    "old, new, field, message",
    [
        ("uri: data/demand.parquet", "uri: 'x/{date}/a.parquet'", "sources.demand.uri", r"may hold only \{as_of\}"),
        (
            "uri: data/demand.parquet",
            "uri: 'x/{as_of/a.parquet'",
            "sources.demand.uri",
            r"braces are not a valid template",
        ),
        (
            "    partitioning: null\n",
            "    partitioning: null\n    filter: [[a, '~', 1]]\n",
            "sources.demand.filter[0]",
            r"operator '~' is not one of",
        ),
        (
            "    partitioning: null\n",
            "    partitioning: null\n    filter: [[a, in, 3]]\n",
            "sources.demand.filter[0]",
            r"must be a non-empty list",
        ),
        (
            "    partitioning: null\n",
            "    partitioning: null\n    filter: [[a, '=']]\n",
            "sources.demand.filter[0]",
            r"a list of three",
        ),
        (
            "    partitioning: null\n",
            "    partitioning: null\n    filter: a\n",
            "sources.demand.filter",
            r"expected a list of \[column, op, value\] terms",
        ),
    ],
)
def test_bad_dated_uri_or_filter(old, new, field, message):
    (problem,) = parse_registry(_edit(old, new), FILE).source_problems
    assert problem.field == field and re.search(message, problem.message), str(problem)


def test_max_staleness_is_a_source_setting():
    reg = parse_registry(_edit("frequency: D", "frequency: D\n    max_staleness: 3"), FILE)
    assert reg.source_problems == () and reg.sources["demand"].staleness_allowed == 3
    assert reg.sources["demand"].to_dict()["max_staleness"] == 3
    default = parse_registry(VALID, FILE).sources["demand"]
    assert default.max_staleness is None and default.staleness_allowed == 1 and "max_staleness" not in default.to_dict()
    hourly = parse_registry(_edit("frequency: D", "frequency: h"), FILE).sources["demand"]
    assert hourly.staleness_allowed == 24  # one day of hourly periods  # common practice
    text = _edit("frequency: D", "frequency: D\n    max_staleness: -1")
    (problem,) = parse_registry(text, FILE).source_problems
    assert problem.field == "sources.demand.max_staleness" and "expected a whole number of periods" in problem.message
    assert problem.line == _line(text, "max_staleness")


def test_max_staleness_days_is_a_policy_setting():
    text = _edit("refit_policy: approval", "refit_policy: approval\n  max_staleness_days: 7")
    assert parse_registry(text, FILE).policy.to_dict()["max_staleness_days"] == 7
    assert "max_staleness_days" not in parse_registry(VALID, FILE).policy.to_dict()  # null: results unchanged
    text = _edit("refit_policy: approval", "refit_policy: approval\n  max_staleness_days: 1.5")
    with pytest.raises(RegistryError) as info:
        parse_registry(text, FILE)
    (problem,) = info.value.problems
    assert problem.field == "policy.max_staleness_days" and "expected a whole number of days" in problem.message
    assert problem.line == _line(text, "max_staleness_days")


def _holiday_registry(tmp_path, frequency: str, file_text: str | None) -> tuple[str, Registry]:
    if file_text is not None:
        (tmp_path / "holidays.txt").write_text(file_text, encoding="utf-8")
    text = _edit("frequency: D", f"frequency: {frequency}\n    holiday_file: holidays.txt")
    text = text.replace("seasonal: [0, 1, 1, 7]", "seasonal: [0, 1, 1, 5]")
    return text, parse_registry(text, FILE, base_dir=tmp_path)


def test_a_holiday_file_joins_the_holidays(tmp_path):
    text, reg = _holiday_registry(tmp_path, "B", "# our bank holidays\n2026-12-25 Christmas Day\n\n2026-12-28, moved\n")
    source = reg.sources["demand"]
    assert reg.source_problems == () and source.holidays == ("2026-12-25", "2026-12-28")
    assert source.to_dict()["holiday_file"] == "holidays.txt"
    # a source re-read from its record (no registry folder) keeps the dates it was read with
    record = {k: tuple(v) if isinstance(v, list) else v for k, v in source.to_dict().items()}
    again = type(source).model_validate(record | {"name": "demand", "line": 0})
    assert again.holidays == source.holidays


@pytest.mark.parametrize(
    "frequency, file_text, message",
    [
        (
            "B",
            None,
            r"cannot read holiday file 'holidays.txt' \(No such file or directory; looked for .*holidays.txt\)",
        ),
        ("B", "2026-12-25\nBoxing Day 2026-12-26\n", r"line 2 of holiday file 'holidays.txt' starts with 'Boxing'"),
        ("D", "2026-12-25\n", r"a holiday file applies to business days \(frequency B\) only, not to 'D'"),
    ],
)
def test_bad_holiday_files_are_source_problems(tmp_path, frequency, file_text, message):
    text, reg = _holiday_registry(tmp_path, frequency, file_text)
    (problem,) = reg.source_problems
    assert problem.field == "sources.demand.holiday_file" and re.search(message, problem.message), str(problem)
    assert problem.line == _line(text, "holiday_file")


@pytest.mark.parametrize(
    "frequency, spec, expected",
    [
        ("D", "{family: arima, order: [1, 0, 0], seasonal: [0, 1, 1, calendar]}", ("seasonal", (0, 1, 1, 7))),
        ("B", "{family: smoothing, seasonal: add, period: calendar}", ("period", 5)),
        ("MS", "{family: smoothing, trend: add, damped: true, seasonal: add, period: calendar}", ("period", 12)),
    ],
)
def test_a_seasonal_period_may_be_the_calendars(frequency, spec, expected):
    # seasons of the calendars: 7 days a week, 5 business days a week, 12 months  # common practice
    text = _edit("frequency: D", f"frequency: {frequency}").replace(
        "spec: {family: arima, order: [0, 1, 1]}", f"spec: {spec}"
    )
    reg = parse_registry(text, FILE)
    key, value = expected
    south = reg.model("south-demand")
    assert south.spec[key] == value and south.season == {"D": 7, "B": 5, "MS": 12}[frequency]
    assert south.audit_settings(reg.policy).season == south.season


def test_the_calendar_word_needs_a_calendar_with_a_season():
    text = _edit("frequency: D", "frequency: YE").replace(
        "spec: {family: arima, order: [0, 1, 1]}", "spec: {family: smoothing, seasonal: add, period: calendar}"
    )
    reg = parse_registry(text, FILE)
    rejected = {r.id: r for r in reg.rejected}["south-demand"]
    (problem,) = [p for p in rejected.problems if "calendar" in p.message]
    assert problem.field == "models[1].spec.period" and "whose calendar has no season" in problem.message


def test_the_season_is_filled_in_not_written():
    text = VALID.replace("    windows: {fit: 365, audit: 28}\n", "    windows: {fit: 365, audit: 28}\n    season: 3\n")
    rejected = {r.id: r for r in parse_registry(text, FILE).rejected}["south-demand"]
    assert any(p.field == "models[1].season" and "unknown" in p.message for p in rejected.problems)


@pytest.mark.parametrize(
    "frequency, holidays, message",
    [
        ("D", "[2026-12-25]", r"holidays apply to business days \(frequency B\) only, not to 'D'"),
        ("B", "[2026-13-01]", r"expected a date like 2026-12-25"),
        ("B", "2026-12-25", r"expected a list of dates"),
    ],
)
def test_bad_holidays_are_source_problems(frequency, holidays, message):
    text = _edit("frequency: D", f"frequency: {frequency}\n    holidays: {holidays}")
    reg = parse_registry(text, FILE)
    (problem,) = reg.source_problems
    assert problem.field.startswith("sources.demand.holidays"), str(problem)
    assert re.search(message, problem.message), str(problem)
    assert problem.line == _line(text, "holidays:")


# ------------------------------------------------------------------------------------------
# registry-level problems: parse refuses, listing every problem with file:line: field
# ------------------------------------------------------------------------------------------
REGISTRY_CASES = [
    # (case id, old, new, needle for the line (None: no line check), field, message pattern)
    ("yaml-syntax", "  key: district\n", "  key: [district\n", "frequency: D", "", r"YAML syntax error"),
    ("missing-version", "version: 1\n", "", None, "version", r"missing.*'version: 1'"),
    ("wrong-version", "version: 1\n", "version: 2\n", "version: 2", "version", r"expected 1.*got 2"),
    ("version-as-text", "version: 1\n", "version: '1'\n", "version: '1'", "version", r"expected 1.*got '1'"),
    (
        "missing-policy",
        "policy:\n  level: 0.05\n",
        "policy_removed:\n  level: 0.05\n",
        "policy_removed",
        "policy_removed",
        r"unknown key 'policy_removed' \(did you mean 'policy'\?\)",
    ),
    (
        "blank-justification",
        'justification: "5% per check with BH at q = 0.10 bounds false flags across the fleet"',
        'justification: "  "',
        "justification",
        "policy.justification",
        r"must not be blank",
    ),
    (
        "missing-approver",
        '  approved_by: "R. Example, Head of Model Risk"\n',
        "",
        "policy:",
        "policy.approved_by",
        r"missing; .*approver",
    ),
    (
        "level-out-of-range",
        "level: 0.05",
        "level: 0.7",
        "level: 0.7",
        "policy.level",
        r"open interval \(0, 0\.5\), got 0\.7",
    ),
    ("level-nan", "level: 0.05", "level: .nan", "level: .nan", "policy.level", r"open interval \(0, 0\.5\), got nan"),
    (
        "unknown-correction",
        "multiple_testing: bh",
        "multiple_testing: holm",
        "holm",
        "policy.multiple_testing",
        r"expected one of 'bh', 'by', 'bonferroni', 'none', got 'holm'",
    ),
    (
        "persistence-k-above-n",
        "persistence: {k: 2, n: 3}",
        "persistence: {k: 4, n: 3}",
        "persistence",
        "policy.persistence.k",
        r"k = 4 exceeds n = 3",
    ),
    (
        "too-few-replicates",
        "replicates: 999",
        "replicates: 50",
        "replicates: 50",
        "policy.replicates",
        r"integer >= 99, got 50",
    ),
    ("negative-seed", "seed: 20261201", "seed: -1", "seed: -1", "policy.seed", r"integer >= 0, got -1"),
    (
        "policy-unknown-key",
        "  fdr_q: 0.10\n",
        "  fdr_q: 0.10\n  levle: 0.01\n",
        "levle",
        "policy.levle",
        r"unknown key 'levle' \(did you mean 'level'\?\)",
    ),
    ("top-unknown-key", "models:\n", "model:\n", "model:", "model", r"unknown key 'model' \(did you mean 'models'\?\)"),
    (
        "models-not-a-list",
        "models:\n",
        "models: {first: north-demand}\nold_models:\n",
        "models:",
        "models",
        r"expected a list of model entries",
    ),
    (
        "sources-not-a-mapping",
        "sources:\n  demand:",
        "sources: [demand]\nunused:\n  demand:",
        "sources:",
        "sources",
        r"expected a mapping of source names",
    ),
    (
        "duplicate-top-key",
        "version: 1\n",
        "version: 1\nversion: 1\n",
        "version: 1\nversion",
        "version",
        r"duplicate key 'version' \(first given on line 1\)",
    ),
]


@pytest.mark.parametrize("case, old, new, needle, field, message", REGISTRY_CASES, ids=[c[0] for c in REGISTRY_CASES])
def test_registry_level_problem(case, old, new, needle, field, message):
    text = _edit(old, new)
    with pytest.raises(RegistryError) as info:
        parse_registry(text, FILE)
    matches = [p for p in info.value.problems if p.field == field and re.search(message, p.message)]
    assert matches, f"{case}: {[str(p) for p in info.value.problems]}"
    problem = matches[0]
    assert problem.file == FILE
    if needle is not None:
        if case == "yaml-syntax":  # the parser notices the unclosed bracket at the next mapping key
            assert _line(text, "[district") <= problem.line <= _line(text, needle)
        elif case == "duplicate-top-key":
            assert problem.line == 2
        else:
            assert problem.line == _line(text, needle)
    assert str(problem) in str(info.value)  # the error message lists every problem


def test_registry_error_lists_every_problem():
    text = _edit("version: 1\n", "version: 3\n")
    text = _edit("level: 0.05", "level: 2", text)
    text = _edit("models:\n", "modelz:\n", text)
    with pytest.raises(RegistryError) as info:
        parse_registry(text, FILE)
    fields = [p.field for p in info.value.problems]
    assert {"version", "policy.level", "modelz", "models"} <= set(fields)
    assert re.search(r"registry\.yaml has \d+ problem\(s\); the audit cannot start", str(info.value))
    for p in info.value.problems:
        assert str(p) in str(info.value)


@pytest.mark.parametrize(
    "tagged",
    [
        "!!python/object/apply:os.system ['echo hacked']",
        "!!python/object:collections.OrderedDict {}",
        "!!python/name:os.system",
        "!custom 3",
        "!!binary aGVsbG8=",
        "!!set {a, b}",
    ],
)
def test_object_tags_are_refused(tagged):
    text = _edit("    owner: Forecasting team\n    tier: 1", f"    owner: {tagged}\n    tier: 1")
    with pytest.raises(RegistryError, match=r"the tag .* is refused: the registry accepts only plain YAML") as info:
        parse_registry(text, FILE)
    assert info.value.problems[0].line == _line(text, tagged)


def test_alias_bomb_is_refused_quickly():
    bomb = "a: &a [x, x, x, x, x, x, x, x, x, x]\n"
    for i, name in enumerate("bcdefgh"):
        prev = "abcdefgh"[i]
        bomb += f"{name}: &{name} [" + ", ".join([f"*{prev}"] * 10) + "]\n"
    text = VALID + "extra:\n" + "".join("  " + line + "\n" for line in bomb.splitlines())
    with pytest.raises(RegistryError, match=r"expands to more than 100000 values through aliases"):
        parse_registry(text, FILE)


def test_self_referencing_alias_is_refused():
    text = _edit("    exogenous: [temp_c]\n", "    exogenous: &loop [temp_c, *loop]\n")
    with pytest.raises(RegistryError, match=r"refers to itself"):
        parse_registry(text, FILE)


def test_empty_document():
    with pytest.raises(RegistryError, match=r"the registry is empty"):
        parse_registry("# nothing here\n", FILE)


def test_unreadable_file(tmp_path):
    missing = tmp_path / "nope.yaml"
    with pytest.raises(RegistryError, match=r"nope\.yaml: cannot read the registry \(No such file or directory\)"):
        load_registry(missing)
    problems = check_registry(missing)
    assert len(problems) == 1 and problems[0].line is None


def test_not_utf8(tmp_path):
    path = tmp_path / FILE
    path.write_bytes(VALID.encode("utf-8") + b"# caf\xe9\n")
    with pytest.raises(RegistryError, match=r"not UTF-8 text") as info:
        load_registry(path)
    assert info.value.problems[0].line == VALID.count("\n") + 1


def test_tab_indentation_is_a_syntax_error():
    text = _edit("    owner: Forecasting team\n    tier: 1", "    owner: Forecasting team\n\ttier: 1")
    with pytest.raises(RegistryError, match=r"YAML syntax error.*(tab|\\t)"):
        parse_registry(text, FILE)


# ------------------------------------------------------------------------------------------
# entry-level problems: the entry is rejected with all its problems, the others go on
# ------------------------------------------------------------------------------------------
SOUTH = """  - id: south-demand
    owner: Forecasting team
    tier: 1
    source: demand
    series: south
    spec: {family: arima, order: [0, 1, 1]}
    noise: normal
    windows: {fit: 365, audit: 28}
"""

NORTH_LINE = _line(VALID, "- id: north-demand")

ENTRY_CASES = [
    # (case id, old (within the south entry), new, needle, field, message pattern)
    (
        "unknown-key",
        "    tier: 1\n",
        "    tier: 1\n    windw: 3\n",
        "windw",
        "models[1].windw",
        r"unknown key 'windw' \(did you mean 'windows'\?\); valid keys are 'id'",
    ),
    (
        "unsafe-id",
        "id: south-demand",
        "id: ../../etc/passwd",
        "../../etc",
        "models[1].id",
        r"id '\.\./\.\./etc/passwd' is not allowed",
    ),
    ("id-with-newline", "id: south-demand", 'id: "south\\n"', "south\\n", "models[1].id", r"is not allowed"),
    (
        "case-duplicate-id",
        "id: south-demand",
        "id: North-Demand",
        "North-Demand",
        "models[1].id",
        rf"already used on line {NORTH_LINE} as 'north-demand' \(ids differing only in case",
    ),
    (
        "missing-owner",
        "    owner: Forecasting team\n    tier: 1\n",
        "    tier: 1\n",
        "id: south-demand",
        "models[1].owner",
        r"missing; required in every model entry",
    ),
    ("tier-out-of-range", "tier: 1", "tier: 5", "tier: 5", "models[1].tier", r"expected an integer from 1 to 3, got 5"),
    (
        "tier-as-text",
        "tier: 1",
        "tier: high",
        "tier: high",
        "models[1].tier",
        r"expected an integer from 1 to 3, got 'high'",
    ),
    (
        "unknown-source",
        "source: demand",
        "source: demnd",
        "source: demnd",
        "models[1].source",
        r"unknown source 'demnd' \(did you mean 'demand'\?\); declared sources are 'demand'",
    ),
    (
        "series-boolean",
        "series: south",
        "series: NO",
        "series: NO",
        "models[1].series",
        r"got False \(YAML reads the unquoted word 'NO' as a boolean; quote it",
    ),
    (
        "unknown-family",
        "family: arima, order: [0, 1, 1]",
        "family: prophet",
        "prophet",
        "models[1].spec.family",
        r"Unknown model family 'prophet'; valid families are .*'arima'",
    ),
    (
        "missing-family",
        "{family: arima, order: [0, 1, 1]}",
        "{order: [0, 1, 1]}",
        "spec: {order",
        "models[1].spec.family",
        r"missing; a spec needs a 'family'",
    ),
    (
        "bad-order",
        "order: [0, 1, 1]",
        "order: abc",
        "order: abc",
        "models[1].spec.order",
        r"'order' parameter of Arima must be 3 non-negative integers .*Got 'abc'",
    ),
    (
        "bad-trend",
        "order: [0, 1, 1]}",
        "order: [1, 0, 0], trend: q}",
        "trend: q",
        "models[1].spec.trend",
        r"'trend' parameter of Arima must be one of",
    ),
    (
        "unknown-hyperparameter",
        "order: [0, 1, 1]",
        "ordr: [0, 1, 1]",
        "ordr",
        "models[1].spec.ordr",
        r"unknown hyperparameter 'ordr' for family 'arima' \(did you mean 'order'\?\)",
    ),
    (
        "seasonal-without-period",
        "order: [0, 1, 1]",
        "order: [0, 1, 1], seasonal: [1, 0, 0, 1]",
        "seasonal",
        "models[1].spec",
        r"need a period s >= 2",
    ),
    (
        "unknown-noise-law",
        "noise: normal",
        "noise: gauss",
        "noise: gauss",
        "models[1].noise",
        r"Unknown noise law 'gauss'; valid noise laws are 'normal'",
    ),
    (
        "student-t-df-too-small",
        "noise: normal",
        "noise: {law: student-t, df: 1}",
        "student-t",
        "models[1].noise.law",
        r"must be a finite number > 2",
    ),
    (
        "shape-for-wrong-law",
        "noise: normal",
        "noise: {law: normal, df: 5}",
        "law: normal, df",
        "models[1].noise.df",
        r"'df' is the shape of the 'student-t' law, not of 'normal'",
    ),
    (
        "noise-unknown-key",
        "noise: normal",
        "noise: {law: normal, scale: 2}",
        "scale",
        "models[1].noise.scale",
        r"unknown key 'scale'",
    ),
    (
        "undeclared-exogenous",
        "    series: south\n",
        "    series: south\n    exogenous: [humidity]\n",
        "humidity",
        "models[1].exogenous[0]",
        r"column 'humidity' is not declared by source 'demand'; its exogenous columns are 'temp_c', 'rain_mm'",
    ),
    (
        "audit-longer-than-fit",
        "windows: {fit: 365, audit: 28}",
        "windows: {fit: 20, audit: 28}",
        "fit: 20",
        "models[1].windows.audit",
        r"audit window \(28\) is longer than the fit window \(20\); need fit >= audit >= 1",
    ),
    (
        "zero-window",
        "windows: {fit: 365, audit: 28}",
        "windows: {fit: 365, audit: 0}",
        "audit: 0",
        "models[1].windows.audit",
        r"integer >= 1, got 0",
    ),
    (
        "missing-window-key",
        "windows: {fit: 365, audit: 28}",
        "windows: {fit: 365}",
        "windows: {fit: 365}",
        "models[1].windows.audit",
        r"missing; windows need fit and audit",
    ),
    (
        "settings-unknown-key",
        "    windows: {fit: 365, audit: 28}\n",
        "    windows: {fit: 365, audit: 28}\n    settings: {seed: 3}\n",
        "settings",
        "models[1].settings.seed",
        r"unknown key 'seed'; valid keys are 'level', 'calibration', 'replicates'",
    ),
    (
        "settings-replicates",
        "    windows: {fit: 365, audit: 28}\n",
        "    windows: {fit: 365, audit: 28}\n    settings: {replicates: 10}\n",
        "settings",
        "models[1].settings.replicates",
        r"integer >= 99, got 10",
    ),
    (
        "bad-date",
        "    windows: {fit: 365, audit: 28}\n",
        "    windows: {fit: 365, audit: 28}\n    last_validated: last week\n",
        "last_validated",
        "models[1].last_validated",
        r"expected a date like 2026-06-30, got 'last week'",
    ),
    (
        "value-is-key",
        "    series: south\n",
        "    series: south\n    value: district\n",
        "value: district",
        "models[1].value",
        r"'district' is the source's key or time column",
    ),
    (
        "entry-not-a-mapping",
        SOUTH,
        "  - just a string\n",
        "just a string",
        "models[1]",
        r"expected a mapping with id, owner",
    ),
    (
        "merge-key",
        "    tier: 1\n",
        "    tier: 1\n    <<: {owner: x}\n",
        "<<",
        "models[1].<key>",
        r"merge keys \('<<'\) are not supported",
    ),
    (
        "non-text-key",
        "    tier: 1\n",
        "    tier: 1\n    3: x\n",
        "3: x",
        "models[1].<key>",
        r"keys must be text, got 3",
    ),
]


@pytest.mark.parametrize("case, old, new, needle, field, message", ENTRY_CASES, ids=[c[0] for c in ENTRY_CASES])
def test_entry_level_problem(case, old, new, needle, field, message):
    south = _edit(old, new, SOUTH)
    text = _edit(SOUTH, south)
    reg = parse_registry(text, FILE)  # does not raise: one broken entry never sinks the registry
    assert [m.id for m in reg.models] == ["north-demand"], case
    assert len(reg.rejected) == 1
    rejected = reg.rejected[0]
    assert isinstance(rejected, RejectedEntry)
    assert rejected.line == _line(text, south.split("\n")[0], after=NORTH_LINE)
    matches = [p for p in rejected.problems if p.field == field and re.search(message, p.message)]
    assert matches, f"{case}: {[str(p) for p in rejected.problems]}"
    assert matches[0].line == _line(text, needle, after=rejected.line - 1)
    assert str(matches[0]).startswith(f"{FILE}:{matches[0].line}: {field}: ")
    assert SAFE_ID.match(rejected.safe_id)


def test_duplicate_id_points_at_the_later_entry():
    text = _edit("id: south-demand", "id: north-demand")
    reg = parse_registry(text, FILE)
    rejected = reg.rejected[0]
    second = [i for i, line in enumerate(text.splitlines(), 1) if "id: north-demand" in line][1]
    problem = next(p for p in rejected.problems if p.field == "models[1].id")
    assert problem.line == second
    assert f"already used on line {_line(text, 'id: north-demand')}" in problem.message
    assert rejected.id == "north-demand" and rejected.safe_id == "entry-1"  # never the accepted model's folder


def test_unsafe_id_gets_a_safe_name_and_keeps_the_raw_id():
    text = _edit("id: south-demand", 'id: "<script>alert(1)</script>"')
    rejected = parse_registry(text, FILE).rejected[0]
    assert rejected.id == "<script>alert(1)</script>" and rejected.safe_id == "entry-1"
    assert rejected.owner == "Forecasting team"


def test_entry_collects_every_problem():
    south = SOUTH.replace("tier: 1", "tier: 0").replace("noise: normal", "noise: gauss").replace("fit: 365", "fit: 3")
    reg = parse_registry(_edit(SOUTH, south), FILE)
    fields = {p.field for p in reg.rejected[0].problems}
    assert {"models[1].tier", "models[1].noise", "models[1].windows.audit"} <= fields
    lines = [p.line for p in reg.rejected[0].problems]
    assert lines == sorted(lines)


def test_broken_source_is_dropped_and_its_models_rejected(tmp_path):
    text = _edit("frequency: D", "frequency: daily")
    reg = parse_registry(text, FILE)
    assert reg.models == () and reg.sources == {}
    assert [p.field for p in reg.source_problems] == ["sources.demand.frequency"]
    assert re.search(r"expected one of '15min', .* got 'daily'", reg.source_problems[0].message)
    for rejected in reg.rejected:
        problem = next(p for p in rejected.problems if p.field.endswith(".source"))
        assert re.search(
            r"source 'demand' has 1 problem\(s\) and was dropped; first: registry\.yaml:\d+: "
            r"sources\.demand\.frequency",
            problem.message,
        )
    path = tmp_path / FILE
    path.write_text(text, encoding="utf-8")
    all_fields = [p.field for p in check_registry(path)]
    assert "sources.demand.frequency" in all_fields and "models[0].source" in all_fields


SOURCE_CASES = [
    (
        "source-unknown-key",
        "    partitioning: null\n",
        "    partitioning: null\n    format: parquet\n",
        "format",
        "sources.demand.format",
        r"unknown key 'format'",
    ),
    (
        "source-missing-uri",
        "    uri: data/demand.parquet\n",
        "",
        "  demand:",
        "sources.demand.uri",
        r"missing; a source needs 'uri'",
    ),
    (
        "source-bad-partitioning",
        "partitioning: null",
        "partitioning: directory",
        "directory",
        "sources.demand.partitioning",
        r"expected one of 'hive'",
    ),
    (
        "source-frequency-case",
        "frequency: D",
        "frequency: d",
        "frequency: d",
        "sources.demand.frequency",
        r"did you mean 'D'\?",
    ),
    (
        "source-same-columns",
        "value: demand",
        "value: district",
        "  demand:",
        "sources.demand",
        r"key, time and value must be three different columns",
    ),
    (
        "source-exogenous-not-list",
        "exogenous: [temp_c, rain_mm]",
        "exogenous: temp_c",
        "exogenous: temp_c",
        "sources.demand.exogenous",
        r"expected a list of column names",
    ),
    (
        "source-unsafe-name",
        "  demand:\n",
        "  ../demand:\n",
        "../demand",
        "sources.../demand",
        r"source name '\.\./demand' is not allowed",
    ),
]


@pytest.mark.parametrize("case, old, new, needle, field, message", SOURCE_CASES, ids=[c[0] for c in SOURCE_CASES])
def test_source_problem(case, old, new, needle, field, message):
    text = _edit(old, new)
    reg = parse_registry(text, FILE)
    matches = [p for p in reg.source_problems if p.field == field and re.search(message, p.message)]
    assert matches, f"{case}: {[str(p) for p in reg.source_problems]}"
    assert matches[0].line == _line(text, needle)
    assert reg.models == ()  # both models use the dropped source


def test_check_registry_reports_registry_and_entry_problems_together(tmp_path):
    text = _edit("level: 0.05", "level: 5")
    text = _edit("tier: 1", "tier: 7", text)
    path = tmp_path / FILE
    path.write_text(text, encoding="utf-8")
    problems = check_registry(path)
    assert {"policy.level", "models[1].tier"} <= {p.field for p in problems}
    assert [p.line for p in problems] == sorted(p.line for p in problems)
    with pytest.raises(RegistryError) as info:
        load_registry(path)
    assert {p.field for p in info.value.problems} == {"policy.level"}  # entry problems do not stop the run


# ------------------------------------------------------------------------------------------
# the typed values: settings and noise law built from the entry, JSON Schema, bounds
# ------------------------------------------------------------------------------------------
def test_entry_builds_its_audit_settings_and_noise_law():
    from fitaudit.core.audit import AuditSettings

    reg = parse_registry(VALID, FILE)
    north, south = reg.model("north-demand"), reg.model("south-demand")
    # the entry's overrides (replicates 499, bootstrap), the policy's level and seed, the entry's audit window,
    # the daily calendar's season (7)
    assert north.audit_settings(reg.policy) == AuditSettings(
        level=0.05, calibration="bootstrap", replicates=499, seed=20261201, audit_window=28, season=7
    )
    assert south.audit_settings(reg.policy) == AuditSettings(
        level=0.05, calibration="simulated", replicates=999, seed=20261201, audit_window=28, season=7
    )
    assert north.noise_law() == {"law": "student-t", "shape": 5.0} and south.noise_law() == {
        "law": "normal",
        "shape": None,
    }


def test_entry_survives_its_plain_view():
    """Staging writes ``to_dict()`` into a batch file and reads the typed entry back."""
    reg = parse_registry(VALID, FILE)
    for entry in reg.models:
        back = entry_from_dict(json.loads(canonical_json(entry.to_dict())))
        assert back == entry and back.to_dict() == entry.to_dict()


def test_policy_partitions_reach_the_audit_settings():
    from fitaudit.core.audit import AuditSettings
    from fitaudit.core.vocabulary import PARTITION_KINDS

    if "partitions" not in AuditSettings.__dataclass_fields__:
        pytest.skip("AuditSettings has no partitions field")
    reg = parse_registry(VALID, FILE)
    assert reg.model("south-demand").audit_settings(reg.policy).partitions == AuditSettings().partitions
    assert "partitions" not in reg.policy.to_dict()  # results of registries without it keep their bytes
    chosen = tuple(PARTITION_KINDS[::-1][:2])
    text = _edit("  seed: 20261201\n", f"  seed: 20261201\n  partitions: [{', '.join(chosen)}]\n")
    reg = parse_registry(text, FILE)
    assert reg.policy.partitions == chosen == reg.model("south-demand").audit_settings(reg.policy).partitions
    with pytest.raises(RegistryError) as info:
        parse_registry(
            _edit("  seed: 20261201\n", f"  seed: 20261201\n  partitions: [{PARTITION_KINDS[0].upper()}]\n"), FILE
        )
    (problem,) = info.value.problems
    assert problem.field == "policy.partitions[0]" and problem.line == _line(VALID, "seed:") + 1
    assert re.search(
        rf"expected one of .*got '{PARTITION_KINDS[0].upper()}' \(did you mean '{PARTITION_KINDS[0]}'\?\)",
        problem.message,
    )


def test_setting_bounds_come_from_the_vocabulary():
    """One bound per setting: the registry refuses just below and accepts at each bound of
    ``SETTING_BOUNDS`` (policy and per-model settings alike)."""
    from fitaudit.core.vocabulary import SETTING_BOUNDS

    lowest = SETTING_BOUNDS["replicates"][0].left
    for where, old, line in (
        ("policy", "  replicates: 999\n", "  replicates: {}\n"),
        ("models[0].settings", "replicates: 499,", "replicates: {},"),
    ):
        reg = parse_registry(_edit(old, line.format(lowest)), FILE)
        assert reg.rejected == ()
        text = _edit(old, line.format(lowest - 1))
        problems = check_registry_text(text)
        assert [p.message for p in problems if p.field == f"{where}.replicates"] == [
            f"expected an integer >= {lowest}, got {lowest - 1}"
        ]
    schema = registry_json_schema()["$defs"]
    assert schema["Policy"]["properties"]["replicates"]["minimum"] == lowest
    assert schema["ModelSettings"]["properties"]["replicates"]["minimum"] == lowest
    level = SETTING_BOUNDS["level"][0]
    assert (
        schema["Policy"]["properties"]["level"]["exclusiveMinimum"],
        schema["Policy"]["properties"]["level"]["exclusiveMaximum"],
    ) == (level.left, level.right)


def check_registry_text(text: str) -> list[RegistryProblem]:
    """Every problem of a registry text, registry- and entry-level."""
    try:
        reg = parse_registry(text, FILE)
    except RegistryError as exc:
        return exc.problems
    return [p for r in reg.rejected for p in r.problems] + list(reg.source_problems)


def test_json_schema_describes_what_the_parser_accepts():
    import jsonschema

    schema = registry_json_schema()
    validator = jsonschema.Draft202012Validator(schema)
    jsonschema.Draft202012Validator.check_schema(schema)
    valid = json.loads(json.dumps(yaml.safe_load(VALID), default=str))  # dates as ISO text, as an editor sees them
    assert list(validator.iter_errors(valid)) == []
    example = (pathlib.Path(__file__).resolve().parents[1] / "examples" / "registry.yaml").read_text()
    assert list(validator.iter_errors(json.loads(json.dumps(yaml.safe_load(example), default=str)))) == []
    for old, new, where in (
        ("    tier: 1\n", "    tier: 1\n    windw: 3\n", ["models", 1]),
        ("tier: 1", "tier: 5", ["models", 1, "tier"]),
        ("frequency: D", "frequency: daily", ["sources", "demand", "frequency"]),
        ("  fdr_q: 0.10\n", "  fdr_q: 0.10\n  levle: 0.01\n", ["policy"]),
        ("noise: normal", "noise: gauss", ["models", 1, "noise"]),
    ):
        broken = json.loads(json.dumps(yaml.safe_load(_edit(old, new)), default=str))
        errors = list(validator.iter_errors(broken))
        assert len(errors) == 1 and list(jsonschema.exceptions.best_match(errors).absolute_path) == where, new
        assert check_registry_text(_edit(old, new))  # the parser refuses it too
    assert "line" not in schema["$defs"]["ModelEntry"]["properties"]  # filled in by the loader, never written


def test_a_registry_changed_since_its_audit_is_refused(tmp_path):
    from fitaudit.tasks.registry import RegistryChangedError, require_digest

    path = tmp_path / FILE
    path.write_text(VALID, encoding="utf-8")
    audited = load_registry(path).sha256
    require_digest(load_registry(path), audited)  # the same bytes: accepted
    require_digest(load_registry(path), None)  # no digest: no check
    path.write_text(VALID + "# edited\n", encoding="utf-8")
    changed = load_registry(path)
    with pytest.raises(RegistryChangedError) as info:
        require_digest(changed, audited)
    assert str(info.value).startswith(f"{path}: the registry changed since the audit that asked for this refit")
    assert audited in str(info.value) and changed.sha256 in str(info.value) and "fitaudit run" in str(info.value)


def test_fields_the_loader_fills_in_are_unknown_keys_in_the_yaml():
    reg = parse_registry(_edit("    tier: 1\n", "    tier: 1\n    line: 3\n"), FILE)
    (problem,) = reg.rejected[0].problems
    assert problem.field == "models[1].line" and problem.message.startswith("unknown key 'line'; valid keys are 'id'")


# ------------------------------------------------------------------------------------------
# property: random documents never crash the parser
# ------------------------------------------------------------------------------------------
_WORDS = [
    "version",
    "policy",
    "sources",
    "models",
    "id",
    "spec",
    "family",
    "arima",
    "noise",
    "windows",
    "fit",
    "audit",
    "level",
    "uri",
    "key",
    "time",
    "value",
    "frequency",
    "D",
    "-",
    ":",
    "[",
    "]",
    "{",
    "}",
    ",",
    "&a",
    "*a",
    "!!int",
    "!!str",
    "!x",
    "<<",
    "'",
    '"',
    "#",
    "|",
    ">",
    "?",
    "1",
    "0.5",
    "-3",
    "yes",
    "~",
    "2026-02-30",
    "\n",
    "\n  ",
    "\n    ",
    "\t",
    " ",
    "é",
    "\u202e",
    "1e999",
]


def _outcome(text: str) -> None:
    try:
        reg = parse_registry(text, FILE)
    except RegistryError as exc:
        assert exc.problems and all(isinstance(p, RegistryProblem) for p in exc.problems)
        return
    canonical_json(reg.to_dict())  # whatever was accepted serialises


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.sampled_from(_WORDS), max_size=60).map(" ".join))
def test_random_token_soup_never_crashes(text):
    _outcome(text)


_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=True),
    st.text(max_size=12),
    st.sampled_from(["arima", "normal", "student-t", "D", "demand", "north"]),
)
_keys = st.one_of(
    st.sampled_from(
        [
            "version",
            "policy",
            "sources",
            "models",
            "id",
            "owner",
            "tier",
            "source",
            "series",
            "spec",
            "family",
            "order",
            "noise",
            "law",
            "df",
            "windows",
            "fit",
            "audit",
            "level",
            "justification",
            "approved_by",
            "uri",
            "key",
            "time",
            "value",
            "frequency",
        ]
    ),
    st.text(max_size=8),
)
_trees = st.recursive(
    _scalars,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(_keys, inner, max_size=5)),
    max_leaves=25,
)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_trees)
def test_random_structures_never_crash(tree):
    _outcome(yaml.safe_dump(tree, allow_unicode=True))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_mutated_valid_documents_never_crash(data):
    lines = VALID.splitlines()
    for _ in range(data.draw(st.integers(1, 4))):
        i = data.draw(st.integers(0, len(lines) - 1))
        action = data.draw(st.sampled_from(["drop", "duplicate", "replace", "indent"]))
        if action == "drop":
            lines.pop(i)
        elif action == "duplicate":
            lines.insert(i, lines[i])
        elif action == "replace":
            prefix = lines[i].split(":")[0]
            lines[i] = f"{prefix}: {data.draw(st.sampled_from(_WORDS))}"
        else:
            lines[i] = " " + lines[i]
        if not lines:
            break
    _outcome("\n".join(lines) + "\n")


def test_a_large_registry_is_parsed_in_a_child_with_the_same_result(tmp_path, monkeypatch):
    """Above CHILD_PARSE_BYTES the flow's registry task parses in a child process (to keep the
    parse's temporary memory out of the flow process): the same registry, the same errors."""
    from fitaudit.tasks.registry import task as registry_task

    monkeypatch.setattr(registry_task, "CHILD_PARSE_BYTES", 0)  # every file counts as large
    good = tmp_path / "registry.yaml"
    good.write_text(VALID)
    in_child = registry_task.load_registry_task.fn(str(good))
    in_process = load_registry(str(good))
    assert in_child == in_process and in_child.sha256 == in_process.sha256 and len(in_child.models) == 2
    bad = tmp_path / "bad.yaml"
    bad.write_text(VALID.replace("level: 0.05", "level: 7"))
    with pytest.raises(RegistryError) as here:
        load_registry(str(bad))
    with pytest.raises(RegistryError) as child:
        registry_task.load_registry_task.fn(str(bad))
    assert [str(p) for p in child.value.problems] == [str(p) for p in here.value.problems]
    assert str(child.value) == str(here.value) and child.value.problems
