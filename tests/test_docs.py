"""Documents cite only what the repository holds.

Code, tests and documents may cite ``docs/method.md`` and ``docs/architecture.md`` (by section,
``docs/method.md §6.3``, or by a section's title) and published sources; never a document that is
not in the repository, and never the verification tags of private notes. These tests read every
text file of the repository (``.git``, ``.venv``, caches and build output excluded).
"""

from __future__ import annotations

import os
import pathlib
import re

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]
SKIP_DIRS = {
    ".git",
    ".venv",
    "venv",
    "__pycache__",
    ".prefect",
    ".hypothesis",
    ".pytest_cache",
    ".ruff_cache",
    "build",
    "dist",
    "fitaudit-demo",
    "node_modules",
}
SKIP_SUFFIXES = {".pyc", ".npz", ".parquet", ".gz", ".zip", ".png", ".jpg", ".pdf", ".pickle", ".whl"}
THIS_FILE = pathlib.Path(__file__).resolve()

#: Background documents that exist only outside the repository: any mention must be the docs/ file.
DOC_NAMES = ("method", "design", "governance", "prefect", "style")
BARE_DOC = re.compile(r"(?P<prefix>[\w./-]*?)\b(?P<name>" + "|".join(DOC_NAMES) + r")\.md\b")
TAG = re.compile(r"\[[VS]:")
CITED_DOCS = ("method", "architecture")
CITATION = re.compile(r"docs/(?P<doc>method|architecture)\.md|§\s*(?P<section>\d+(?:\.\d+)*)")
NUMBER_WITHOUT_SIGN = re.compile(r"docs/(?:method|architecture)\.md,?\s+\d")
BY_TITLE = re.compile(r'docs/(?P<doc>method|architecture)\.md,?\s*"(?P<title>[^"]+)"')
HEADING = re.compile(r"^#{2,4}\s+(?P<number>\d+(?:\.\d+)*)\.?\s+(?P<title>.+?)\s*$", re.MULTILINE)


def _text_files() -> list[tuple[pathlib.Path, str]]:
    """(relative path, text) of every UTF-8 file, not descending into skipped folders."""
    files = []
    for folder, dirs, names in os.walk(ROOT):
        dirs[:] = sorted(d for d in dirs if d not in SKIP_DIRS and not d.endswith(".egg-info"))
        for name in sorted(names):
            path = pathlib.Path(folder) / name
            if path.suffix in SKIP_SUFFIXES or path.resolve() == THIS_FILE:
                continue
            try:
                files.append((path.relative_to(ROOT), path.read_text(encoding="utf-8")))
            except (UnicodeDecodeError, OSError):
                continue  # binary or unreadable: not a document
    return files


FILES = _text_files()


def _sections(doc: str) -> dict[str, str]:
    """Section number -> title of docs/<doc>.md."""
    text = (ROOT / "docs" / f"{doc}.md").read_text(encoding="utf-8")
    return {m["number"]: m["title"] for m in HEADING.finditer(text)}


SECTIONS = {doc: _sections(doc) for doc in CITED_DOCS}


def _line(text: str, pos: int) -> int:
    return text.count("\n", 0, pos) + 1


def bare_doc_problems(text: str) -> list[tuple[int, str]]:
    """Mentions of a background document that is not ``docs/<name>.md`` in this repository."""
    out = []
    for m in BARE_DOC.finditer(text):
        if not m["prefix"].endswith("docs/") or not (ROOT / "docs" / f"{m['name']}.md").is_file():
            out.append(
                (
                    m.start(),
                    f"{m.group(0)!r} is not a document of this repository "
                    "(cite docs/method.md or docs/architecture.md)",
                )
            )
    return out


def tag_problems(text: str) -> list[tuple[int, str]]:
    """Verification tags such as ``[V:C3]`` or ``[S:A]`` from private notes."""
    return [(m.start(), f"tag {text[m.start() : m.start() + 8]!r}") for m in TAG.finditer(text)]


def section_problems(text: str, own: str | None = None) -> list[tuple[int, str]]:
    """``§N`` citations naming no section.  A ``§N`` belongs to the last docs/method.md or
    docs/architecture.md mentioned before it on the same line; in those two documents a bare ``§N``
    means the document itself (``own``).  ``docs/method.md 3.4`` without the sign is a problem too."""
    out, offset = [], 0
    for line in text.split("\n"):
        current = own
        for m in CITATION.finditer(line):
            if m["doc"]:
                current = m["doc"]
            elif current is not None and m["section"] not in SECTIONS[current]:
                out.append((offset + m.start(), f"docs/{current}.md has no section §{m['section']}"))
        offset += len(line) + 1
    for m in NUMBER_WITHOUT_SIGN.finditer(text):
        out.append((m.start(), f"write {m.group(0)!r} with a section sign (docs/method.md §N)"))
    return out


def title_problems(text: str) -> list[tuple[int, str]]:
    """``docs/method.md, "Cells and partitions"``: the quoted words must begin a section title."""
    out = []
    for m in BY_TITLE.finditer(text):
        title = " ".join(m["title"].split()).lower()
        if not any(t.lower().startswith(title) for t in SECTIONS[m["doc"]].values()):
            out.append((m.start(), f"docs/{m['doc']}.md has no section titled {m['title']!r}"))
    return out


def _report(check, *with_own: bool) -> list[str]:
    problems = []
    for rel, text in FILES:
        args = (
            (rel.stem if rel.parent == pathlib.Path("docs") and rel.stem in CITED_DOCS else None,) if with_own else ()
        )
        problems += [f"{rel}:{_line(text, pos)}: {msg}" for pos, msg in check(text, *args)]
    return problems


def test_the_project_documents_exist_and_are_numbered():
    names = {str(rel) for rel, _ in FILES}
    assert {"README.md", "DEVELOPERS.md", "core/cells.py", "docs/method.md"} <= names  # the walk sees the tree
    for doc in CITED_DOCS:
        numbers = SECTIONS[doc]
        assert numbers, f"docs/{doc}.md has no numbered sections"
        top = sorted(int(n) for n in numbers if "." not in n)
        assert top == list(range(1, len(top) + 1)), f"docs/{doc}.md: top-level sections are not 1..N: {top}"
    assert SECTIONS["method"]["6"].startswith("Cells and partitions")


def test_no_document_outside_the_repository_is_cited():
    problems = _report(bare_doc_problems)
    assert not problems, "\n".join(problems)


def test_no_private_verification_tags():
    problems = _report(tag_problems)
    assert not problems, "\n".join(problems)


def test_section_citations_name_existing_sections():
    problems = _report(section_problems, True)
    assert not problems, "\n".join(problems)


def test_title_citations_name_existing_sections():
    problems = _report(title_problems)
    assert not problems, "\n".join(problems)


def test_architecture_paths_exist():
    """Every repository path the architecture document names (e.g. ``core/cells.py``) exists, so a
    module that moves must move its row in "Where each concept lives" too."""
    text = (ROOT / "docs" / "architecture.md").read_text(encoding="utf-8")
    paths = re.findall(r"`((?:core|tasks|flows|templates|tests|bench|docs|examples|api|demo)/[\w./-]*)`", text)
    assert "core/vocabulary.py" in paths
    missing = sorted({p for p in paths if not (ROOT / p).exists()})
    assert not missing, f"docs/architecture.md names paths that do not exist: {missing}"


#: A document name that is not in the repository, spelled so that this file does not itself cite it.
OUTSIDE_DOC = "design" + ".md"


@pytest.mark.parametrize(
    "text,own,ok",
    [
        ("see docs/method.md §6.3 and §10.2", None, True),
        ('see docs/method.md, "Cells and\n    partitions"', None, True),
        ("see §5.4", "method", True),
        ("see method.md 4.2", None, False),
        (f"see {OUTSIDE_DOC} section 4", None, False),
        (f"see docs/{OUTSIDE_DOC}", None, False),  # not in the repository
        ("(docs/method.md §99)", None, False),
        ("docs/architecture.md §3 and docs/method.md §1.9", None, False),
        ("see §42", "architecture", False),
        ("docs/method.md 3.4", None, False),
        ('docs/method.md "Calibration of the moon"', None, False),
        ("checked [V:C3]", None, False),
    ],
)
def test_the_checks_themselves(text, own, ok):
    """The checks above catch what they should and pass what they should (a check that cannot fail
    would be a defect)."""
    found = bare_doc_problems(text) + tag_problems(text) + section_problems(text, own) + title_problems(text)
    assert (not found) is ok, found
