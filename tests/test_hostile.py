"""Hostile content: markup, direction marks, huge strings and path segments in every user field.

A registry whose model ids (safe ones, and unsafe ones that must be rejected), owners,
descriptions, policy text, series keys and column names carry ``<script>``, event-handler
attributes, quotes, U+202E, NUL, 20,000-character strings, ``../`` and absolute paths is audited
once.  The run completes; every HTML page it writes parses without a script element, event
attribute or unexpected link, and shows the hostile text escaped (visible as text, never as
markup); every file the run created is listed and lies inside the archive under a safe name.
The registry loader refuses object-constructing YAML tags before they can run anything, and the
documentation says that a nonlinear model's mean function is imported from the registry's path
and that this is code execution.
"""

from __future__ import annotations

import html.parser
import json
import pathlib
import re
import sys

import numpy as np
import pyarrow as pa
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures
from fleet_fixtures import AS_OF, AUDITED, Fleet, ar1, days, write_parquet  # noqa: E402

from fitaudit.core.vocabulary import VERDICTS  # noqa: E402
from fitaudit.tasks.archive import verify_archive  # noqa: E402
from fitaudit.tasks.registry import MAX_ID_LENGTH, SAFE_ID, RegistryError, load_registry  # noqa: E402

pytestmark = pytest.mark.server

SCRIPT = "<script>alert('fitaudit')</script>"
IMG = '<img src=x onerror="alert(1)">'
RLO = "\u202e"  # RIGHT-TO-LEFT OVERRIDE: reorders the rest of a line
LONG = ("<b>" + "A" * 4995 + "</b>") * 4  # 20,012 characters of markup
ABSOLUTE = "/tmp/fitaudit-hostile-absolute"
VALUE_COLUMN = "<script>v</script>"
EXOG_COLUMN = "x\"'<>&"

#: Model ids that are safe file names yet unusual (all audited).
SAFE_IDS = ["a" * MAX_ID_LENGTH, "x.html", "index", "method", "CON", "a..b", "1-._"]
#: Unsafe ids: the entries are rejected and get an ``entry-<n>`` file name.
UNSAFE_IDS = [
    SCRIPT,
    "../../escape",
    ABSOLUTE,
    "a\x00b",
    f"evil{RLO}lmth.exe",
    "b" * (MAX_ID_LENGTH + 1),
    "tab\there",
    "line\nbreak",
]
#: Hostile series keys (in the extract and the registry); audited like any other key.
KEYS = [SCRIPT, "../../etc/passwd", ABSOLUTE + "/key", f"key{RLO}gpj.exe", "q\"uo'te", "k" * 1000, IMG]


def _write(root: pathlib.Path) -> Fleet:
    rng = np.random.default_rng(666)
    data = root.parent / "hostile-data"  # the source lies outside the registry's folder: "../" in a uri is a read only
    t = days()
    keys, times, values, exog = [], [], [], []
    for key in KEYS + ["plain"]:
        keys += [key] * len(t)
        times.append(t)
        values.append(ar1(rng))
        exog.append(np.round(rng.normal(20, 3, len(t)), 1))
    table = pa.table(
        {
            "series": keys,
            "date": pa.array(np.concatenate(times)),
            VALUE_COLUMN: np.concatenate(values),
            EXOG_COLUMN: np.concatenate(exog),
        }
    )
    write_parquet(data / "h.parquet", table)
    fleet = Fleet(root)
    fleet.policy.update(justification=SCRIPT + LONG, approved_by=f"{IMG} {RLO}tsop")
    fleet.source("hostile", "../hostile-data/h.parquet", value=VALUE_COLUMN, exogenous=(EXOG_COLUMN,))
    owners = [SCRIPT, f'O\'Brien & "Sons" <i>{RLO}</i>', LONG, "{{ 7 * 7 }} {% raw %}"]
    for i, model_id in enumerate(SAFE_IDS):
        fleet.model(model_id, "hostile", "plain", owner=owners[i % len(owners)], description=IMG + LONG)
    for i, key in enumerate(KEYS):
        fleet.model(
            f"key-{i}", "hostile", key, exogenous=[EXOG_COLUMN], owner=owners[i % len(owners)], description=SCRIPT
        )
    for model_id in UNSAFE_IDS:
        fleet.model(model_id, "hostile", "plain", owner=SCRIPT, description=IMG)
    fleet.model("Case-Twin", "hostile", "plain")
    fleet.model("case-twin", "hostile", "plain")  # differs only in case: would collide as a file name
    fleet.model("nul-owner", "hostile", "plain", owner="a\x00b")
    fleet.model("nul-key", "hostile", "a\x00b")
    fleet.model(
        "os-system",
        "hostile",
        "plain",
        spec={"family": "nonlinear-ar", "function": "os:system", "lags": [1], "start": {"c": 1.0, "a": 0.5}},
    )
    fleet.write()
    return fleet


def _snapshot(folder: pathlib.Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


@pytest.fixture(scope="module")
def hostile_run(prefect_server, tmp_path_factory):
    from fitaudit.flows.audit import audit_flow

    outer = tmp_path_factory.mktemp("hostile")
    root = outer / "registry-folder"
    root.mkdir()
    fleet = _write(root)
    before = _snapshot(outer)
    run = audit_flow(registry=str(root / "registry.yaml"), as_of=AS_OF, archive=str(root / "archive"))
    created = sorted(set(_snapshot(outer)) - set(before))
    return fleet, run, outer, created


class _Page(html.parser.HTMLParser):
    """Collects tags, attributes and text of a page."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.tags, self.attrs, self.text = [], [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs += [(tag, k, v or "") for k, v in attrs]

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)

    def handle_data(self, data):
        self.text.append(data)


def _pages(run: dict) -> dict[pathlib.Path, bytes]:
    folder = pathlib.Path(run["report"]).parent
    pages = {p: p.read_bytes() for p in folder.rglob("*.html")}
    pages[pathlib.Path(run["archive"]) / "index.html"] = (pathlib.Path(run["archive"]) / "index.html").read_bytes()
    return pages


def test_run_completes_and_accounts_for_every_entry(hostile_run):
    fleet, run, _, _ = hostile_run
    doc = json.loads((pathlib.Path(run["report"]).parent / "results.json").read_bytes())
    assert doc["summary"]["registered"] == len(fleet.models) == sum(doc["summary"][v] for v in VERDICTS)
    verdicts = {m["id"]: m["verdict"] for m in doc["models"]}
    for model_id in SAFE_IDS + [f"key-{i}" for i in range(len(KEYS))] + ["Case-Twin"]:
        assert verdicts[model_id] in AUDITED, (model_id, verdicts[model_id])
    for model_id in UNSAFE_IDS + ["nul-owner", "nul-key", "os-system"]:
        assert verdicts[model_id] == "error", model_id
    twins = [m for m in doc["models"] if m["id"] == "case-twin"]
    assert twins[0]["verdict"] == "error" and "ids differing only in case would collide" in twins[0]["reasons"][0]
    os_system = next(m for m in doc["models"] if m["id"] == "os-system")
    assert re.search(r"the mean function 'os:system' raised TypeError", os_system["reasons"][0])
    assert {m["id"] for m in doc["models"]} >= set(UNSAFE_IDS)  # the raw ids are kept as data
    assert verify_archive(run["archive"]) == []


def test_every_file_is_inside_the_archive_under_a_safe_name(hostile_run):
    _, run, outer, created = hostile_run
    archive = pathlib.Path(run["archive"]).relative_to(outer).as_posix()
    run_folder = pathlib.Path(run["report"]).parent.relative_to(outer).as_posix()
    assert created, "the run wrote nothing"
    for rel in created:
        assert rel.startswith(archive + "/"), f"written outside the archive: {rel}"
        inside = rel[len(archive) + 1 :]
        # the archive's private caches: null tables named by digest (not by id), and the source digests,
        # which staging keeps once the extract is older than RACY_SECONDS (on a slow machine, in this run)
        private = re.fullmatch(r"\.tables/[0-9a-f]{40}\.npz", inside) or inside == ".fingerprints/cache.json"
        assert inside in ("chain.jsonl", "index.html", ".lock") or private or rel.startswith(run_folder + "/"), rel
        for part in rel[len(run_folder) + 1 :].split("/") if rel.startswith(run_folder + "/") else []:
            assert SAFE_ID.match(part), f"unsafe file name {part!r}"
    doc = json.loads((outer / run_folder / "results.json").read_bytes())
    pages = {p for p in created if p.startswith(run_folder + "/models/")}
    assert pages == {f"{run_folder}/models/{m['safe_id']}.html" for m in doc["models"]}
    assert all(SAFE_ID.match(m["safe_id"]) for m in doc["models"])
    assert not pathlib.Path(ABSOLUTE).exists() and not list(pathlib.Path("/tmp").glob("fitaudit-hostile-absolute*"))
    assert not (outer / "escape").exists() and not (outer.parent / "escape").exists()


def test_every_page_escapes_the_hostile_text(hostile_run):
    _, run, _, _ = hostile_run
    shown = ""
    for path, data in _pages(run).items():
        text = data.decode("utf-8")
        assert "<script" not in text.lower(), f"{path.name}: raw script tag"
        assert RLO not in text and "\x00" not in text, f"{path.name}: raw direction mark or NUL"
        page = _Page()
        page.feed(text)
        page.close()
        assert "script" not in page.tags and "iframe" not in page.tags and "object" not in page.tags, path.name
        for tag, name, value in page.attrs:
            assert not name.startswith("on"), f"{path.name}: event attribute {name}={value!r} on <{tag}>"
            if name in ("href", "src", "action", "xlink:href"):
                assert re.fullmatch(
                    r"(#[\w.-]*|(\.\./)?([A-Za-z0-9][\w.-]*/)*[A-Za-z0-9][\w.-]*\.html(#[\w.-]*)?)", value
                ), f"{path.name}: unexpected link {value!r}"
        shown += "".join(page.text)
    assert SCRIPT in shown and "onerror" in shown  # shown as text, escaped in the markup
    assert "[U+202E]" in shown  # the direction mark is made visible instead of reordering the line
    assert "{{ 7 * 7 }}" in shown and "49" not in re.findall(
        r"\{\{.*?\}\}", shown
    )  # data is never evaluated as a template


def test_registry_loader_refuses_object_constructing_tags_before_running_them(tmp_path):
    marker = tmp_path / "pwned"
    tags = [
        f"!!python/object/apply:os.system ['touch {marker}']",
        f"!!python/object/apply:subprocess.check_call [['touch', '{marker}']]",
        "!!python/object/new:os.system [echo]",
        "!!python/name:os.system",
        "!!python/module:os",
        "!include /etc/passwd",
    ]
    for tag in tags:
        path = tmp_path / "registry.yaml"
        path.write_text(
            "version: 1\npolicy: {justification: j, approved_by: a}\nsources: {}\nmodels: []\nextra: " + tag + "\n"
        )
        with pytest.raises(RegistryError, match=r"registry\.yaml:5: the tag .* is refused"):
            load_registry(path)
        assert not marker.exists(), tag


def test_docs_state_that_a_mean_function_import_is_code_execution(repo_root):
    import fitaudit.core.models.nonlinear as nonlinear

    doc = " ".join(nonlinear.__doc__.split())
    assert re.search(r"Importing the function runs code", doc)
    assert re.search(r"exactly that module, nothing else is searched or evaluated", doc)
    developers = " ".join((repo_root / "DEVELOPERS.md").read_text().split())
    assert re.search(r"imports exactly that path: registering a model is code execution", developers)
    readme = " ".join((repo_root / "README.md").read_text().split())
    assert re.search(r"mean function is imported from the path the registry names: that runs code", readme)
