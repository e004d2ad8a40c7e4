"""Packaging and layering rules (docs/architecture.md §1; DEVELOPERS.md, "Layering rules")."""

from __future__ import annotations

import ast
import pathlib
import sys
import tomllib

import pytest

REPO = pathlib.Path(__file__).resolve().parents[1]
TOP = ("core", "tasks", "flows", "templates", "demo")
#: The folder installed as the package ``fitaudit`` itself (its public surface).
API = "api"


def _pyproject() -> dict:
    return tomllib.loads((REPO / "pyproject.toml").read_text())


def test_every_package_folder_is_listed():
    cfg = _pyproject()["tool"]["setuptools"]
    listed = set(cfg["packages"])
    mapping = cfg["package-dir"]
    found = {"fitaudit"}
    assert mapping["fitaudit"] == API and (REPO / API / "__init__.py").is_file()
    for top in TOP:
        for init in (REPO / top).rglob("__init__.py"):
            rel = init.parent.relative_to(REPO / top)
            dotted = "fitaudit." + top + ("" if rel == pathlib.Path(".") else "." + ".".join(rel.parts))
            found.add(dotted)
        assert mapping[f"fitaudit.{top}"] == top
    assert found == listed, (
        f"folders with __init__.py {sorted(found - listed)} are not listed; listed but missing {sorted(listed - found)}"
    )


def test_installed_under_one_namespace():
    import fitaudit
    import fitaudit.core
    import fitaudit.demo
    import fitaudit.flows
    import fitaudit.tasks
    import fitaudit.templates

    assert pathlib.Path(fitaudit.__file__).parent == REPO / API
    assert pathlib.Path(fitaudit.core.__file__).parent == REPO / "core"
    # nothing called core/tasks/flows/api at top level of the import system (outside the repo folder)
    for name in (*TOP, API):
        spec_paths = [p for p in sys.path if p and pathlib.Path(p).resolve() != REPO]
        for p in spec_paths:
            assert not (pathlib.Path(p) / name / "__init__.py").exists() or "site-packages" not in p, name


FORBIDDEN = (
    "prefect",
    "jinja2",
    "pyarrow",
    "pandas",
    "yaml",
    "fitaudit.tasks",
    "fitaudit.flows",
    "fitaudit.templates",
    "statsmodels",
)
ALLOWED_THIRD_PARTY = ("numpy", "scipy")


def _imports(tree: ast.AST):
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0 and node.module:
                yield node.module, node.lineno


@pytest.mark.parametrize("path", sorted((REPO / "core").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO)))
def test_core_imports_only_stdlib_numpy_scipy(path):
    tree = ast.parse(path.read_text(), filename=str(path))
    stdlib = sys.stdlib_module_names
    for module, line in _imports(tree):
        root = module.split(".")[0]
        assert not any(module == f or module.startswith(f + ".") for f in FORBIDDEN), f"{path}:{line} imports {module}"
        assert root in stdlib or root in ALLOWED_THIRD_PARTY or module.startswith("fitaudit.core"), (
            f"{path}:{line} imports {module}; core/ may import only the standard library, numpy and scipy"
        )


#: The one core module that names scipy's modules at import time: every other reaches them through its lazy
#: proxies, so importing core costs no scipy (an eager ``from scipy import stats`` in one module loaded
#: ``scipy.stats``, 62 MiB, into every process that imported the audit).
SCIPY_HOME = "core/_scipy.py"


@pytest.mark.parametrize("path", sorted((REPO / "core").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO)))
def test_core_reaches_scipy_through_its_lazy_proxies(path):
    if path.relative_to(REPO).as_posix() == SCIPY_HOME:
        return
    for node in ast.parse(path.read_text(), filename=str(path)).body:  # module level only
        if isinstance(node, ast.Import):
            modules = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0:
            modules = [node.module or ""]
        else:
            continue
        for module in modules:
            assert module.split(".")[0] != "scipy", (
                f"{path}:{node.lineno} imports {module} at module level; use `from ._scipy import ...` ({SCIPY_HOME})"
            )


#: The one module that imports Jinja2 (docs/architecture.md §1.2); the report's views and charts only build dicts.
JINJA_HOME = "tasks/report/render.py"


@pytest.mark.parametrize(
    "path",
    sorted(p for top in ("core", "tasks", "flows", "demo", API) for p in (REPO / top).rglob("*.py")),
    ids=lambda p: str(p.relative_to(REPO)),
)
def test_only_the_report_renderer_imports_jinja2(path):
    rel = path.relative_to(REPO).as_posix()
    imports = _imports(ast.parse(path.read_text(), filename=str(path)))
    jinja = [line for module, line in imports if module.split(".")[0] == "jinja2"]
    assert rel == JINJA_HOME or not jinja, f"{rel}:{jinja[0]} imports jinja2; only {JINJA_HOME} may"
    assert rel != JINJA_HOME or jinja, f"{JINJA_HOME} no longer imports jinja2: update JINJA_HOME"


@pytest.mark.parametrize(
    "path",
    sorted(p for top in ("tests", "bench") for p in (REPO / top).rglob("*.py")),
    ids=lambda p: str(p.relative_to(REPO)),
)
def test_tests_import_fitaudit_namespace_only(path):
    tree = ast.parse(path.read_text(), filename=str(path))
    for module, line in _imports(tree):
        assert module.split(".")[0] not in (*TOP, API), (
            f"{path}:{line} imports {module}; import fitaudit.{module} instead"
        )


def _absolute_imports(source: str, rel: pathlib.PurePath):
    """Every module that ``source`` (the file ``rel`` under the repository) imports, with its line;
    relative imports are resolved within the ``fitaudit`` namespace."""
    package = ["fitaudit"] if rel.parts[0] == API else ["fitaudit", rel.parts[0]]
    package += rel.parts[1:-1]
    for node in ast.walk(ast.parse(source, filename=str(rel))):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            parent = package[: len(package) - node.level + 1] if node.level else []
            base = ".".join([*parent, *([node.module] if node.module else [])])
            if node.module is None:  # ``from .. import demo``: the names are modules
                for alias in node.names:
                    yield f"{base}.{alias.name}", node.lineno
            else:
                yield base, node.lineno


#: The only modules outside demo/ that may import the demo scenario: the demo command and the command
#: line that starts it (docs/architecture.md §1).  The audit itself never depends on the fiction.
DEMO_IMPORTERS = ("flows/demo.py", "flows/cli.py")


def _imports_of(package: str, source: str, rel: pathlib.PurePath) -> list[int]:
    return [line for module, line in _absolute_imports(source, rel) if module.split(".")[:2] == package.split(".")]


def test_layer_import_detector_resolves_relative_imports():
    """The checks below can fail: absolute, relative and ``from .. import demo`` forms are all found."""
    source = (
        "from fitaudit.demo import write_demo\n"
        "from ..demo import scenario\n"
        "from .. import demo\n"
        "import fitaudit.demo.scenario\n"
        "from . import audit\n"
        "from ..tasks.demo_notes import x\n"
    )
    rel = pathlib.PurePosixPath("flows/probe.py")
    assert _imports_of("fitaudit.demo", source, rel) == [1, 2, 3, 4]  # common practice: one hit per line
    assert _imports_of("fitaudit.flows", source, rel) == [5]
    assert _imports_of("fitaudit.demo", "from .scenario import x\n", pathlib.PurePosixPath("demo/__init__.py")) == [1]


@pytest.mark.parametrize(
    "path",
    sorted(p for top in ("core", "tasks", "flows", API) for p in (REPO / top).rglob("*.py")),
    ids=lambda p: str(p.relative_to(REPO)),
)
def test_only_the_demo_command_imports_the_demo(path):
    rel = path.relative_to(REPO)
    lines = _imports_of("fitaudit.demo", path.read_text(), rel)
    assert rel.as_posix() in DEMO_IMPORTERS or not lines, (
        f"{rel}:{lines[0] if lines else ''} imports fitaudit.demo; only {', '.join(DEMO_IMPORTERS)} may"
    )


@pytest.mark.parametrize("path", sorted((REPO / "demo").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO)))
def test_the_demo_imports_core_and_tasks_not_flows(path):
    rel = path.relative_to(REPO)
    lines = _imports_of("fitaudit.flows", path.read_text(), rel)
    assert not lines, (
        f"{rel}:{lines[0]} imports fitaudit.flows; the demo generator imports fitaudit.core and tasks only"
    )


def _task_definitions(tree: ast.AST) -> list[tuple[str, int]]:
    """Prefect task definitions in a module: functions decorated with ``task``/``task(...)`` (bare or
    as ``prefect.task``), calls ``task(fn)`` and imports of ``task`` from prefect, as (what, line)."""

    def is_task(node: ast.AST) -> bool:
        node = node.func if isinstance(node, ast.Call) else node
        return (isinstance(node, ast.Name) and node.id == "task") or (
            isinstance(node, ast.Attribute) and node.attr == "task"
        )

    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            found += [(f"@task {node.name}", d.lineno) for d in node.decorator_list if is_task(d)]
        elif isinstance(node, ast.Call) and is_task(node.func) and node.args:
            found.append(("task(...) call", node.lineno))
        elif isinstance(node, ast.ImportFrom) and (node.module or "").split(".")[0] == "prefect":
            found += [("import of prefect's task", node.lineno) for a in node.names if a.name == "task"]
    return found


def test_task_detector_finds_every_form():
    """The check below can fail: each way of defining a task in a module is found."""
    source = (
        "from prefect import flow, task\n"
        "import prefect\n"
        "@task\ndef a(): ...\n"
        "@task(name='b', retries=2)\ndef b(): ...\n"
        "@prefect.task(name='c')\nasync def c(): ...\n"
        "d = task(lambda: 1)\n"
        "@flow\ndef composed(): a()\n"
    )
    found = _task_definitions(ast.parse(source))
    assert sorted(line for _, line in found) == [1, 3, 5, 7, 9]  # common practice: one hit per definition
    assert _task_definitions(ast.parse("from prefect import flow\n@flow\ndef f(): ...\n")) == []


@pytest.mark.parametrize("path", sorted((REPO / "flows").rglob("*.py")), ids=lambda p: str(p.relative_to(REPO)))
def test_flows_define_no_tasks(path):
    """Every @task lives in tasks/; flows/ only compose them (docs/architecture.md §1.2-§1.3)."""
    found = _task_definitions(ast.parse(path.read_text(), filename=str(path)))
    assert not found, f"{path.relative_to(REPO)} defines tasks (move them into tasks/): " + ", ".join(
        f"{what} at line {line}" for what, line in found
    )


@pytest.mark.slow
def test_wheel_holds_only_the_fitaudit_namespace(tmp_path):
    """A built wheel puts fitaudit/ and its dist-info at the top, nothing named core/tasks/flows/tests."""
    import subprocess
    import zipfile

    out = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", str(REPO), "--no-deps", "-q", "-w", str(tmp_path)],
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert out.returncode == 0, out.stderr
    wheel = next(tmp_path.glob("fitaudit-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    tops = {n.split("/", 1)[0] for n in names}
    assert tops == {"fitaudit", next(t for t in tops if t.endswith(".dist-info"))}
    assert "fitaudit/__init__.py" in names  # the public surface, from api/
    for sub in (
        "core/divergence.py",
        "tasks/archive/__init__.py",
        "demo/scenario.py",
        "flows/cli.py",
        "templates/run.html.j2",
        "templates/report.css",
        "flows/prefect.yaml",
    ):
        assert f"fitaudit/{sub}" in names, sub
