"""``fitaudit registry check --deep`` (fitaudit.tasks.deepcheck): sources opened, series sampled
against the calendar, user mean functions imported; every problem as ``file:line: field: message``."""

from __future__ import annotations

import pathlib
import re

import pytest

from fitaudit.demo import DEMO_AS_OF, write_demo
from fitaudit.flows.cli import EXIT_OK, EXIT_USAGE, main
from fitaudit.tasks.deepcheck import deep_check

REPO = pathlib.Path(__file__).resolve().parents[1]
PROBLEM = re.compile(r"^(?P<file>\S+\.yaml):(?P<line>\d+): (?P<field>\S+): (?P<message>.+)$")


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    """The demo registry without its one planted bad entry, beside the demo's data."""
    root = tmp_path_factory.mktemp("deep")
    demo = write_demo(root / "demo")
    text = pathlib.Path(demo["registry"]).read_text()
    path = root / "registry.yaml"
    path.write_text(text[: text.index("  - id: demand-d-40-legacy")])
    (root / "data").symlink_to(pathlib.Path(demo["data"]))
    return path


def _lines(out: str) -> list[re.Match]:
    found = [PROBLEM.match(line) for line in out.splitlines() if line.strip()]
    assert all(found), out  # every line is file:line: field: message
    return found


def _edited(good: pathlib.Path, tmp_path: pathlib.Path, old: str, new: str) -> pathlib.Path:
    text = good.read_text()
    assert old in text, old
    path = tmp_path / "registry.yaml"
    path.write_text(text.replace(old, new, 1))
    (tmp_path / "data").symlink_to((good.parent / "data").resolve())
    return path


def test_a_good_registry_is_valid_when_deep(good, capsys):
    assert deep_check(good, as_of=DEMO_AS_OF) == []
    assert main(["registry", "check", "--deep", "--as-of", DEMO_AS_OF.isoformat(), str(good)]) == EXIT_OK
    assert "valid (sources opened, mean functions imported)" in capsys.readouterr().out


def test_the_example_registry_without_its_data_is_not_valid_when_deep(capsys):
    example = REPO / "examples" / "registry.yaml"
    assert main(["registry", "check", str(example)]) == EXIT_OK  # the YAML alone is fine
    capsys.readouterr()
    assert main(["registry", "check", "--deep", str(example)]) == EXIT_USAGE
    found = _lines(capsys.readouterr().out)
    fields = {m["field"] for m in found}
    assert any(f.startswith("sources.") and f.endswith(".uri") for f in fields)
    assert any("does not exist" in m["message"] for m in found)
    text = example.read_text().splitlines()
    for m in found:  # each line points at the entry a person would edit
        entry = m["field"].split(".")[0]
        if entry == "sources":
            assert text[int(m["line"]) - 1].strip().rstrip(":") == m["field"].split(".")[1]


@pytest.mark.parametrize(
    "old, new, field, message",
    [
        (
            "    frequency: D\n  network:",
            "    frequency: B\n  network:",
            "sources.demand.frequency",
            r"off the grid of frequency 'B'",
        ),
        (
            "    exogenous: [temp_c]\n    frequency: D",
            "    exogenous: [temp_c, rain_mm]\n    frequency: D",
            "sources.demand.exogenous",
            r"'rain_mm'",
        ),
        ("    key: district", "    key: zone", "sources.demand.uri", r"the key column 'zone' is in none of the files"),
        ("    series: 'd-02'", "    series: 'd-99'", "models[1].series", r"'d-99'"),
        (
            "    uri: data/demand\n",
            "    uri: 'data/{as_of:%Y}/demand'\n",
            "sources.demand.uri",
            r"data/2026/demand.*does not exist",
        ),
        (
            "    spec: {family: arima, order: [1, 0, 1], seasonal: [0, 1, 1, 7], trend: n}\n    noise: normal\n",
            "    spec: {family: nonlinear-ar, function: 'fitaudit_no_such_pkg.m:f', lags: [1], start: {a: 0.5, b: "
            "0.1}}\n    noise: normal\n",
            "models[0].spec.function",
            r"cannot import module 'fitaudit_no_such_pkg.m'",
        ),
    ],
)
def test_a_broken_registry_names_each_problem(good, tmp_path, capsys, old, new, field, message):
    path = _edited(good, tmp_path, old, new)
    assert main(["registry", "check", "--deep", "--as-of", DEMO_AS_OF.isoformat(), str(path)]) == EXIT_USAGE
    found = _lines(capsys.readouterr().out)
    assert any(m["field"] == field and re.search(message, m["message"]) for m in found), [m.string for m in found]
