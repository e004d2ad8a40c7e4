"""Rendering of the report's pages: the Jinja2 environment, its filters and the public render
functions.  The only module of fitaudit that imports Jinja2; the views it renders come from
:mod:`~fitaudit.tasks.report.run_view`, :mod:`~fitaudit.tasks.report.model_view` and
:mod:`~fitaudit.tasks.report.views`.

The model page's per-row loops (autocorrelation table, the checks table) read their rows' items
by subscript (``r["value"]``): Jinja2's dot syntax tries an attribute first, which on a dict costs
a caught AttributeError per cell.  The rows of the map, Q-Q, histogram and cell tables are written
by the filters ``map_rows`` and ``num_rows`` (:mod:`~fitaudit.tasks.report.table_cells`): a
template loop per cell made them a third of a page's template time, and a loop per row with a
filter for its cells still two fifths.
"""

from __future__ import annotations

import functools
from collections.abc import Iterable, Mapping
from typing import Any

import jinja2

from .charts import svg_element
from .model_view import model_page_view
from .run_view import index_view
from .table_cells import map_rows, num_rows
from .text import coord, count_text, format_number, format_p
from .views import archive_view, method_view, page_context


@functools.lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The report's Jinja2 environment (built once and cached).

    Returns
    -------
    jinja2.Environment
        Templates from the ``fitaudit.templates`` package (``PackageLoader``); autoescape on for
        ``.html`` and ``.j2`` names and by default for every other name and string template;
        ``StrictUndefined``, so a missing name raises instead of printing nothing; the filters
        ``num``, ``p``, ``px``, ``count``, ``svg``, ``num_rows`` and ``map_rows``.
    """
    env = jinja2.Environment(
        loader=jinja2.PackageLoader("fitaudit.templates", "."),
        autoescape=jinja2.select_autoescape(enabled_extensions=("html", "j2"), default_for_string=True, default=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        auto_reload=False,  # the templates ship with the package: no file check per page
    )
    env.filters.update(
        num=format_number,
        p=format_p,
        px=coord,
        count=count_text,
        svg=svg_element,
        num_rows=num_rows,
        map_rows=map_rows,
    )
    return env


def _render(template: str, context: Mapping[str, Any]) -> bytes:
    return environment().get_template(template).render(**context).encode("utf-8")


def render_model_page(m: Mapping[str, Any], context: Mapping[str, Any], as_of: str) -> bytes:
    """``models/<safe_id>.html`` of one model record (``context`` from :func:`page_context`)."""
    return _render(
        "model.html.j2", {**context, "root": "../", "m": model_page_view(m, as_of, context.get("policy_doc"))}
    )


def render_index_page(doc: Mapping[str, Any], context: Mapping[str, Any]) -> bytes:
    """``index.html``: summary, exceptions, movement and every model's status row.

    ``doc["models"]`` may hold :func:`fitaudit.tasks.outcomes.light_record` views instead of the
    full records (the page shows only their headline numbers); they are checked as in
    :func:`render_run`.
    """
    return _render("run.html.j2", index_view(doc, context))


def render_method_page(doc: Mapping[str, Any], context: Mapping[str, Any]) -> bytes:
    """``method.html``: the statistics explained, with the run's policy."""
    return _render("method.html.j2", method_view(doc, context))


def render_run(doc: dict, meta: dict) -> dict[str, bytes]:
    """Render every page of an audit run.

    Parameters
    ----------
    doc : dict
        The results document (:func:`fitaudit.tasks.results.build_results`, JSON-ready).
    meta : dict
        Run metadata not in the document: ``run_id``, ``started_utc``, ``finished_utc``,
        ``operator``, ``tool_version``, ``prefect_version`` and, optionally, ``code_commit`` (None
        for an installed package, which the pages say), ``archive_head`` (the chain hash before
        this run) and ``previous_run_id``.

    Returns
    -------
    dict of str to bytes
        ``index.html``, ``method.html`` and ``models/<safe_id>.html`` for every model, UTF-8.

    Raises
    ------
    InputError
        When ``meta`` lacks a field, or a model's ``safe_id`` is not a safe, unique file name.

    Notes
    -----
    The audit flow renders the same pages piecewise (:func:`render_model_page` per model as its
    record is made, :func:`render_index_page` from light records), so that a large run never
    holds every page or every full record at once.
    """
    context = page_context(doc, meta)
    pages: dict[str, bytes] = {}
    pages["index.html"] = render_index_page(doc, context)
    pages["method.html"] = render_method_page(doc, context)
    for m in doc["models"]:
        pages[f"models/{m['safe_id']}.html"] = render_model_page(m, context, doc["run"]["as_of"])
    return pages


def render_archive_index(runs: Iterable[Mapping[str, Any]]) -> bytes:
    """Render the archive's index page.

    Parameters
    ----------
    runs : iterable of dict
        :func:`fitaudit.tasks.archive.list_runs` output: ``run_id``, ``path``, ``as_of``, ``time``,
        ``seq``, ``counts`` (the manifest's verdict counts, or None), ``purged``, ``signoffs`` and
        ``manifest_sha256``.

    Returns
    -------
    bytes
        The UTF-8 page (to be written as ``<archive>/index.html``): one row per run, newest first,
        with its counts, sign-offs and a relative link ``runs/<YYYY>/<run-id>/index.html``; purged
        runs and paths not of that form get no link.
    """
    return _render("archive_index.html.j2", archive_view(runs))
