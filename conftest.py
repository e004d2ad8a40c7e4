"""The doctests of fitaudit.core, run on the installed package (``testpaths`` includes core/).

pyproject.toml maps the folder core/ to the package ``fitaudit.core``.  pytest's own doctest
collection (``--doctest-modules``) would import core/x.py a second time as a top-level module
``core.x``; this hook collects the same examples from ``fitaudit.core.x``, the module users get.
"""

from __future__ import annotations

import importlib
import pathlib

from _pytest.doctest import DoctestModule  # pytest exports no public name for it

ROOT = pathlib.Path(__file__).resolve().parent
#: Source folders whose docstring examples run, and the package each is installed as.
DOCTEST_PACKAGES = {"core": "fitaudit.core"}


class InstalledDoctestModule(DoctestModule):
    """A module's doctests, imported by its installed name rather than its file path."""

    def _getobj(self):
        top, *rest = self.path.relative_to(ROOT).with_suffix("").parts
        if rest and rest[-1] == "__init__":
            rest.pop()
        return importlib.import_module(".".join([DOCTEST_PACKAGES[top], *rest]))


def pytest_collect_file(file_path: pathlib.Path, parent):
    """Collect the doctests of every module under the folders of :data:`DOCTEST_PACKAGES`."""
    if file_path.suffix == ".py" and any(file_path.is_relative_to(ROOT / top) for top in DOCTEST_PACKAGES):
        return InstalledDoctestModule.from_parent(parent, path=file_path)
    return None
