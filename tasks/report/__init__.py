"""The HTML report of an audit run (docs/architecture.md §4).

:func:`render_run` turns the results document (:func:`fitaudit.tasks.results.build_results`, the
machine-readable twin ``results.json``) and the run's metadata into self-contained pages:

``index.html``
    The run page: summary counts first, the expected number of false flags, the exceptions
    (most severe first, one reason each), movement against the previous audit, and every model's
    status over its last eight audits.
``models/<safe_id>.html``
    One page per model: verdict and reasons, the two checks side by side, the divergence map as a
    heat map of T / critical value, residual histogram, Q-Q plot, autocorrelations, parameters,
    change point, candidates, history, data lineage and settings.
``method.html``
    What the statistics mean, with formulas and references, the run's thresholds and the cautions.

:func:`render_archive_index` renders the archive's list of runs.  All pages use inline CSS and
SVG only (no scripts, fonts, images or external links), show every status by symbol and word as
well as colour, give each chart a data table, and print on A4.

The package's modules, from the bottom up:

``text``
    Numbers and user text as printed (bidirectional and control characters made visible).
``labels``
    The report's words: status symbols, movement, labels of lineage, settings and candidates.
``charts``
    SVG chart geometry as plain dictionaries, and their SVG text (no Jinja2).
``views``, ``run_view``, ``model_view``
    The view models: plain dictionaries that templates receive and only format.
``render``
    The Jinja2 environment and the render functions: the only module of fitaudit that imports
    Jinja2.  User-supplied text is escaped by autoescape.
"""

from __future__ import annotations

from .charts import HEAT_BINS, HEAT_SCALE_WORDS
from .labels import CAUTION, FORECAST_ACTIONS, NOT_REFITTED_PAGE, STATUS
from .render import (
    environment,
    render_archive_index,
    render_index_page,
    render_method_page,
    render_model_page,
    render_run,
)
from .views import days_to_act, page_context, record_action

__all__ = [
    "STATUS",
    "HEAT_BINS",
    "HEAT_SCALE_WORDS",
    "CAUTION",
    "NOT_REFITTED_PAGE",
    "FORECAST_ACTIONS",
    "environment",
    "render_run",
    "page_context",
    "render_model_page",
    "render_index_page",
    "render_method_page",
    "render_archive_index",
    "record_action",
    "days_to_act",
]
