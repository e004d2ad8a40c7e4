"""Bad input, table-driven: every case gets a clear verdict and message, the rest of the run goes on.

One audit run covers every entry-, extract- and numeric-level case: each case is its own model
(and its own series, and its own source when the case is about a source), next to a few healthy
models.  For each case the test checks the verdict (``error`` or ``insufficient``; "extra columns"
and "a flaw before the fit window" must not stop the audit), that the message names what a person
needs (the model or its registry field, the source, the row or field, the fix) and, once for the
run, that the healthy models were audited, the run was archived intact and the counts reconcile.

Registry-level problems stop the whole run: they are checked on the parser (one case each) and
once through ``fitaudit run`` (exit code 2, every problem listed, nothing written to the archive).
"""

from __future__ import annotations

import dataclasses
import json
import os
import pathlib
import re
import sys
from collections.abc import Callable

import numpy as np
import pyarrow as pa
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures, nlar_functions
from fleet_fixtures import (  # noqa: E402
    AR1,
    AS_OF,
    AUDIT,
    AUDITED,
    N_DAYS,
    Fleet,
    ar1,
    days,
    fitted_params,
    long_table,
    promote_production,
    results_of,
    write_parquet,
)

from fitaudit.core.vocabulary import VERDICTS  # noqa: E402
from fitaudit.tasks.archive import verify_archive  # noqa: E402
from fitaudit.tasks.registry import RegistryError, check_registry, load_registry  # noqa: E402

pytestmark = pytest.mark.server


@dataclasses.dataclass(frozen=True)
class Case:
    """One bad input: how to build it, the verdict it must get, regexes its message must match."""

    id: str
    what: str
    verdict: str | tuple
    patterns: tuple
    build: Callable


class Ctx:
    """What the builders share: the fleet, the rows of the shared source ``main``, the archive."""

    def __init__(self, root, archive):
        self.fleet = Fleet(root)
        self.root = root
        self.archive = archive
        self.rng = np.random.default_rng(20260828)
        self.main: dict[str, dict[str, np.ndarray]] = {}

    def series(self, key, y=None, t=None, x=None) -> str:
        """Add a series to ``main`` (an AR(1) path on the standard days unless given)."""
        t = days() if t is None else t
        y = ar1(self.rng, len(t)) if y is None else np.asarray(y, dtype=float)
        x = np.round(self.rng.normal(20.0, 3.0, len(t)), 1) if x is None else x
        self.main[key] = {"date": t, "y": y, "x": x}
        return key

    def main_model(self, id, y=None, t=None, x=None, **entry) -> dict:
        """A model on its own series of ``main``."""
        return self.fleet.model(id, "main", self.series(id, y, t, x), **entry)

    def file_source(self, name, table: pa.Table | bytes, **source) -> str:
        """A source of its own: one file holding ``table`` (or raw bytes)."""
        path = self.root / "data" / f"{name}.parquet"
        if isinstance(table, bytes):
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(table)
        else:
            write_parquet(path, table)
        self.fleet.source(name, f"data/{name}.parquet", **source)
        return name

    def one_series_table(self, **columns) -> pa.Table:
        t = days()
        base = {"series": pa.array(["s"] * len(t)), "date": pa.array(t), "y": pa.array(ar1(self.rng))}
        base.update(columns)
        return pa.table(base)


# ------------------------------------------------------------------------------------------
# builders (one per case)
# ------------------------------------------------------------------------------------------
def _registry_entry(**changes):
    def build(c: Ctx, case: Case):
        entry = c.main_model(case.id)
        entry.update(changes)

    return build


def _missing_key(key):
    def build(c: Ctx, case: Case):
        del c.main_model(case.id)[key]

    return build


def _duplicate_id(c: Ctx, case: Case):
    c.main_model("dup-id")  # the first entry is healthy and audited
    c.fleet.model("dup-id", "main", c.series("dup-id-second"))


def _bad_source_entry(c: Ctx, case: Case):
    c.fleet.source("fortnightly", "data/fortnightly.parquet", frequency="fortnightly")
    c.fleet.model(case.id, "fortnightly", "s")


def _unknown_source(c: Ctx, case: Case):
    c.fleet.model(case.id, "nowhere", c.series(case.id))


def _undeclared_exog(c: Ctx, case: Case):
    c.main_model(case.id, exogenous=["rain_mm"])


def _missing_value_column(c: Ctx, case: Case):
    t = days()
    table = pa.table({"series": ["s"] * len(t), "date": pa.array(t), "load": ar1(c.rng)})
    c.fleet.model(case.id, c.file_source("novalue", table), "s")


def _extra_columns(c: Ctx, case: Case):
    t = days()
    table = c.one_series_table(
        notes=pa.array(["<b>n</b>"] * len(t)), flag=pa.array([True] * len(t)), other=pa.array(np.arange(len(t)))
    )
    c.fleet.model(case.id, c.file_source("extra", table), "s")


def _value_as_text(c: Ctx, case: Case):
    table = c.one_series_table(y=pa.array([f"{v:.3f}" for v in ar1(c.rng)]))
    c.fleet.model(case.id, c.file_source("textvalue", table), "s")


def _time_as_text(c: Ctx, case: Case):
    table = c.one_series_table(date=pa.array([str(d)[:10] for d in days()]))
    c.fleet.model(case.id, c.file_source("texttime", table), "s")


def _empty_file(c: Ctx, case: Case):
    c.fleet.model(case.id, c.file_source("emptyfile", b""), "s")


def _corrupt_file(c: Ctx, case: Case):
    noise = np.random.default_rng(1).integers(0, 256, 4096, dtype=np.uint8).tobytes()
    c.fleet.model(case.id, c.file_source("corrupt", b"PAR1" + noise), "s")


def _folder_with_bad_file(c: Ctx, case: Case):
    folder = c.root / "data" / "folder"
    t = days()
    write_parquet(folder / "part-a.parquet", pa.table({"series": ["a"] * len(t), "date": pa.array(t), "y": ar1(c.rng)}))
    write_parquet(folder / "part-b.parquet", pa.table({"series": ["b"] * len(t), "date": pa.array(t), "y": ar1(c.rng)}))
    (folder / "part-c.parquet").write_bytes(b"PAR1 this file was cut off while copying")
    c.fleet.source("folder", "data/folder")
    c.fleet.model("folder-good-a", "folder", "a")
    c.fleet.model("folder-good-b", "folder", "b")
    c.fleet.model(case.id, "folder", "c")  # its rows were in the unreadable file


def _missing_path(c: Ctx, case: Case):
    c.fleet.source("gone", "data/never-written.parquet")
    c.fleet.model(case.id, "gone", "s")


def _mixed_time_zones(c: Ctx, case: Case):
    folder = c.root / "data" / "mixedtz"
    t, y = days(), ar1(c.rng)
    half = len(t) // 2
    aware = pa.array(t[:half], pa.timestamp("us", tz="UTC"))
    write_parquet(folder / "2026-h1.parquet", pa.table({"series": ["s"] * half, "date": aware, "y": y[:half]}))
    write_parquet(
        folder / "2026-h2.parquet",
        pa.table({"series": ["s"] * (len(t) - half), "date": pa.array(t[half:]), "y": y[half:]}),
    )
    c.fleet.source("mixedtz", "data/mixedtz")
    c.fleet.model(case.id, "mixedtz", "s")


def _series_absent(c: Ctx, case: Case):
    c.fleet.model(case.id, "main", "no-such-series")


def _main_with(edit: Callable[[np.ndarray, np.ndarray, np.random.Generator], tuple], **entry):
    """A series of ``main`` changed by ``edit(t, y, rng) -> (t, y)``."""

    def build(c: Ctx, case: Case):
        t, y = edit(days(), ar1(c.rng), c.rng)
        c.main_model(case.id, y=y, t=t, **entry)

    return build


def _duplicate_time(t, y, rng):
    i = N_DAYS - 10
    return np.insert(t, i, t[i]), np.insert(y, i, y[i])


def _swap(t, y, rng):
    t = t.copy()
    i = N_DAYS - 20
    t[i], t[i + 1] = t[i + 1], t[i]
    return t, y


def _off_grid(t, y, rng):
    t = t.copy()
    t[N_DAYS - 5] += np.timedelta64(12, "h")
    return t, y


def _gap(t, y, rng):
    keep = np.ones(len(t), bool)
    keep[N_DAYS - 30 : N_DAYS - 25] = False
    return t[keep], y[keep]


def _set(index, value):
    def edit(t, y, rng):
        y = y.copy()
        y[index] = value
        return t, y

    return edit


def _null_time(t, y, rng):
    t = t.copy()
    t[N_DAYS - 3] = np.datetime64("NaT")
    return t, y


def _huge(t, y, rng):
    return t, y * 1e298


def _constant(t, y, rng):
    return t, np.full(len(t), 5.0)


def _last(n):
    return lambda t, y, rng: (t[-n:], y[-n:])


def _after_as_of(t, y, rng):
    return t + np.timedelta64(N_DAYS + 30, "D"), y


def _negative(t, y, rng):
    return t, y - 60.0  # values around -10


def _exog_gap(c: Ctx, case: Case):
    x = np.round(c.rng.normal(20.0, 3.0, N_DAYS), 1)
    x[N_DAYS - 7] = np.nan
    c.main_model(case.id, x=x, exogenous=["x"])


def _exog_not_in_extract(c: Ctx, case: Case):
    c.main_model(case.id, exogenous=["x_absent"])


def _production(params: dict, spec: dict | None = None):
    """A healthy series whose production version holds ``params`` (fitted for ``spec``)."""

    def build(c: Ctx, case: Case):
        c.main_model(case.id)
        promote_production(c.archive, case.id, dict(spec or AR1), params)

    return build


def _healthy(c: Ctx, case: Case):
    c.main_model(case.id)


def _healthy_with_production(c: Ctx, case: Case):
    y = ar1(c.rng)
    c.main_model(case.id, y=y)
    promote_production(c.archive, case.id, dict(AR1), fitted_params(AR1, y[: N_DAYS - AUDIT]))


def _healthy_exog(c: Ctx, case: Case):
    c.main_model(case.id, exogenous=["x"])


FILE = r"registry\.yaml:\d+"  # every registry problem names the file and line
ERROR, SHORT = "error", "insufficient"

CASES = [
    # -- registry entries (the entry is rejected; the rest of the registry is audited) ------------
    Case(
        "reg-unknown-key",
        "unknown key in a model entry",
        ERROR,
        (FILE, r"models\[\d+\]\.colour", r"unknown key 'colour'", r"valid keys are"),
        _registry_entry(colour="teal"),
    ),
    Case(
        "dup-id",
        "duplicate model id (the second entry)",
        ERROR,
        (
            FILE,
            r"models\[\d+\]\.id",
            r"duplicate id 'dup-id': already used on line \d+",
            r"give every model entry its own id",
        ),
        _duplicate_id,
    ),
    Case(
        "reg-unknown-family",
        "unknown model family",
        ERROR,
        (FILE, r"models\[\d+\]\.spec\.family", r"prophet", r"arima"),
        _registry_entry(spec={"family": "prophet"}),
    ),
    Case(
        "reg-unknown-noise",
        "unknown noise law",
        ERROR,
        (FILE, r"models\[\d+\]\.noise", r"gaussian", r"normal"),
        _registry_entry(noise="gaussian"),
    ),
    Case(
        "reg-unknown-hyperparameter",
        "misspelt spec key",
        ERROR,
        (FILE, r"models\[\d+\]\.spec\.ordr", r"unknown hyperparameter 'ordr'", r"did you mean 'order'"),
        _registry_entry(spec={"family": "arima", "ordr": [1, 0, 0]}),
    ),
    Case(
        "reg-missing-series",
        "required key missing from a model entry",
        ERROR,
        (FILE, r"models\[\d+\]\.series", r"missing; required in every model entry"),
        _missing_key("series"),
    ),
    Case(
        "reg-tier-text",
        "wrong type (text for an integer field)",
        ERROR,
        (FILE, r"models\[\d+\]\.tier", r"expected an integer from 1 to 3, got 'high'"),
        _registry_entry(tier="high"),
    ),
    Case(
        "reg-audit-longer-than-fit",
        "audit window longer than the fit window",
        ERROR,
        (FILE, r"models\[\d+\]\.windows\.audit", r"audit window \(60\) is longer than the fit window \(30\)"),
        _registry_entry(windows={"fit": 30, "audit": 60}),
    ),
    Case(
        "reg-unknown-source",
        "model names an undeclared source",
        ERROR,
        (FILE, r"models\[\d+\]\.source", r"unknown source 'nowhere'", r"declared sources are"),
        _unknown_source,
    ),
    Case(
        "reg-undeclared-exog",
        "exogenous column not declared by the source",
        ERROR,
        (
            FILE,
            r"models\[\d+\]\.exogenous\[0\]",
            r"'rain_mm' is not declared by source 'main'",
            r"sources\.main\.exogenous",
        ),
        _undeclared_exog,
    ),
    Case(
        "reg-bad-source",
        "source with an unknown frequency",
        ERROR,
        (
            FILE,
            r"source 'fortnightly' has 1 problem\(s\) and was dropped",
            r"sources\.fortnightly\.frequency",
            r"Fix the source entry",
        ),
        _bad_source_entry,
    ),
    # -- extracts -----------------------------------------------------------------------------
    Case(
        "x-missing-value-column",
        "value column missing from the extract",
        ERROR,
        (
            r"model 'x-missing-value-column'",
            r"source 'novalue'",
            r"column 'y' is in none of the files",
            r"available columns: .*'load'",
            r"Fix:",
        ),
        _missing_value_column,
    ),
    Case("x-extra-columns", "extra columns in the extract (ignored)", AUDITED, (), _extra_columns),
    Case(
        "x-value-as-text",
        "value column of the wrong type (text)",
        ERROR,
        (
            r"model 'x-value-as-text'",
            r"source 'textvalue'",
            r"column 'y' has type string; expected a numeric column",
            r"Fix: write the column with a numeric",
        ),
        _value_as_text,
    ),
    Case(
        "x-time-as-text",
        "time column of the wrong type (text)",
        ERROR,
        (
            r"model 'x-time-as-text'",
            r"source 'texttime'",
            r"time column 'date' has type string; expected a timestamp",
            r"Fix:",
        ),
        _time_as_text,
    ),
    Case(
        "x-empty-file",
        "empty (0-byte) extract file",
        ERROR,
        (
            r"model 'x-empty-file'",
            r"source 'emptyfile'",
            r"emptyfile\.parquet: empty file \(0 bytes\)",
            r"Fix: rewrite the extract as Parquet",
        ),
        _empty_file,
    ),
    Case(
        "x-corrupt-file",
        "corrupt Parquet bytes",
        ERROR,
        (
            r"model 'x-corrupt-file'",
            r"source 'corrupt'",
            r"corrupt\.parquet: not readable as Parquet",
            r"Fix: rewrite the extract",
        ),
        _corrupt_file,
    ),
    Case(
        "x-folder-unreadable-file",
        "folder with one unreadable file among good ones",
        ERROR,
        (
            r"model 'x-folder-unreadable-file'",
            r"source 'folder'",
            r"series 'c'",
            r"could not be read and may hold it: part-c\.parquet: not readable as Parquet",
            r"Fix: repair or rewrite the unreadable files",
        ),
        _folder_with_bad_file,
    ),
    Case(
        "x-missing-path",
        "source path does not exist",
        ERROR,
        (
            r"model 'x-missing-path'",
            r"source 'gone'",
            r"never-written\.parquet",
            r"does not exist",
            r"Fix: correct sources\.gone\.uri",
        ),
        _missing_path,
    ),
    Case(
        "x-mixed-time-zones",
        "time-zone-aware and naive timestamps in one series",
        ERROR,
        (
            r"model 'x-mixed-time-zones'",
            r"source 'mixedtz'",
            r"time-zone-aware timestamps \('2026-h1\.parquet'\)",
            r"naive timestamps \('2026-h2\.parquet'\)",
            r"Fix: write every file with UTC timestamps",
        ),
        _mixed_time_zones,
    ),
    Case(
        "x-series-absent",
        "series key absent from the source",
        ERROR,
        (
            r"model 'x-series-absent'",
            r"source 'main'",
            r"series 'no-such-series'",
            r"is not in source 'main'",
            r"keys present: ",
            r"Fix: correct the model's 'series'",
        ),
        _series_absent,
    ),
    # -- rows of a series -----------------------------------------------------------------------
    Case(
        "d-duplicate-time",
        "duplicate timestamps",
        ERROR,
        (
            r"model 'd-duplicate-time'",
            r"source 'main'",
            r"2026-08-19 \(rows \d+, \d+\)",
            r"appear more than once",
            r"Fix: keep one row per series and timestamp",
        ),
        _main_with(_duplicate_time),
    ),
    Case(
        "d-unsorted",
        "rows out of time order",
        ERROR,
        (
            r"model 'd-unsorted'",
            r"source 'main'",
            r"row \d+ \(2026-08-09\) follows row \d+ \(2026-08-10\)",
            r"Fix: sort the extract",
        ),
        _main_with(_swap),
    ),
    Case(
        "d-off-grid",
        "irregular timestamp (off the daily grid)",
        ERROR,
        (
            r"model 'd-off-grid'",
            r"source 'main'",
            r"off the grid of frequency 'D'",
            r"2026-08-24T12:00:00",
            r"Fix: align the timestamps",
        ),
        _main_with(_off_grid),
    ),
    Case(
        "d-gap",
        "missing days (gap against the frequency)",
        ERROR,
        (
            r"model 'd-gap'",
            r"source 'main'",
            r"5 timestamp\(s\) missing against frequency 'D'",
            r"first: 2026-07-30",
            r"Fix: fill the gaps",
        ),
        _main_with(_gap),
    ),
    Case(
        "d-null-time",
        "a row without a timestamp",
        ERROR,
        (r"model 'd-null-time'", r"source 'main'", r"1 row\(s\) have no timestamp", r"every row needs a timestamp"),
        _main_with(_null_time),
    ),
    Case(
        "d-nan",
        "NaN value",
        ERROR,
        (
            r"model 'd-nan'",
            r"source 'main'",
            r"column 'y' has 1 missing or NaN value\(s\) at 2026-08-08 \(rows \d+\)",
            r"Fix: impute or remove these rows",
        ),
        _main_with(_set(N_DAYS - 21, np.nan)),
    ),
    Case(
        "d-inf",
        "infinite value",
        ERROR,
        (r"model 'd-inf'", r"source 'main'", r"column 'y' has 1 infinite value\(s\) at 2026-08-27", r"Fix:"),
        _main_with(_set(N_DAYS - 2, np.inf)),
    ),
    Case(
        "d-nan-before-window",
        "NaN before the fit window (does not stop the audit)",
        AUDITED,
        (),
        _main_with(_set(5, np.nan)),
    ),
    Case(
        "d-too-short",
        "series shorter than the fit window",
        SHORT,
        (
            r"model 'd-too-short'",
            r"source 'main'",
            r"series 'd-too-short'",
            r"60 observation\(s\), but at least 200 are needed",
            r"Fix: extend the extract's history, or shorten the windows",
        ),
        _main_with(_last(60)),
    ),
    Case(
        "d-window-longer-than-data",
        "fit window longer than all the data",
        SHORT,
        (
            r"model 'd-window-longer-than-data'",
            r"source 'main'",
            r"240 observation\(s\), but at least 400 are needed",
            r"Fix:",
        ),
        _main_with(lambda t, y, rng: (t, y), fit=400),
    ),
    Case(
        "d-before-as-of",
        "as-of date before all of the series' data",
        ERROR,
        (
            r"model 'd-before-as-of'",
            r"source 'main'",
            r"series 'd-before-as-of': has no rows between \S+ and 2026-08-28T23:59:59",
            r"Fix: check the as-of date and the windows",
        ),
        _main_with(_after_as_of),
    ),
    Case(
        "d-short-for-orders",
        "series shorter than the model orders need",
        SHORT,
        (r"model 'd-short-for-orders'", r"observations", r"(history|window|longer)"),
        _main_with(
            lambda t, y, rng: (t, y),
            fit=40,
            audit=20,
            spec={"family": "arima", "order": [2, 1, 1], "seasonal": [1, 1, 1, 30], "trend": "n"},
        ),
    ),
    Case("d-huge-values", "values of 1e300", (ERROR,) + AUDITED, (), _main_with(_huge)),
    Case("d-tiny-values", "values of 1e-300", (ERROR,) + AUDITED, (), _main_with(lambda t, y, rng: (t, y * 1e-302))),
    Case("d-constant", "constant series", (ERROR, SHORT), (r"model 'd-constant'",), _main_with(_constant)),
    Case(
        "d-negative-multiplicative",
        "negative values under a multiplicative season",
        ERROR,
        (r"model 'd-negative-multiplicative'", r"(positive|negative)"),
        _main_with(_negative, spec={"family": "smoothing", "seasonal": "mul", "period": 7}),
    ),
    Case(
        "d-poisson-on-real-values",
        "a count noise law on negative, non-integer values",
        ERROR,
        (r"model 'd-poisson-on-real-values'", r"(count|integer|negative)"),
        _main_with(_negative, noise="poisson"),
    ),
    Case(
        "d-exog-missing-in-audit-window",
        "exogenous input missing in the audit window",
        ERROR,
        (
            r"model 'd-exog-missing-in-audit-window'",
            r"source 'main'",
            r"exogenous column 'x' has 1 missing or NaN value\(s\) at 2026-08-22",
            r"Fix: fill them in the extract, or remove the column",
        ),
        _exog_gap,
    ),
    Case(
        "d-exog-not-in-extract",
        "exogenous column declared but absent from the extract",
        ERROR,
        (
            r"model 'd-exog-not-in-extract'",
            r"source 'main'",
            r"column 'x_absent' is in none of the files",
            r"Fix: correct the column name in the registry or add the column",
        ),
        _exog_not_in_extract,
    ),
    Case(
        "d-no-convergence",
        "optimiser that does not converge (maxiter 1)",
        ERROR,
        (r"model 'd-no-convergence'", r"did not converge", r"raise maxiter|simplify the orders"),
        _main_with(lambda t, y, rng: (t, y), spec={**AR1, "order": [2, 0, 2], "maxiter": 1}),
    ),
    # -- production parameter versions ----------------------------------------------------------
    Case(
        "p-non-stationary",
        "production version with a non-stationary AR coefficient",
        ERROR,
        (r"model 'p-non-stationary'", r"(stationar|explosive|unit)"),
        _production({"ar1": 1.6, "intercept": 50.0, "sigma2": 1.0}),
    ),
    Case(
        "p-other-spec",
        "production version fitted for another spec",
        ERROR,
        (
            r"model 'p-other-spec'",
            r"production parameter version 2 was fitted for spec",
            r"\[2, 0, 0\]",
            r"fitaudit refit --model p-other-spec",
        ),
        _production({"ar1": 0.4, "ar2": 0.1, "intercept": 50.0, "sigma2": 1.0}, spec={**AR1, "order": [2, 0, 0]}),
    ),
    Case(
        "p-wrong-parameter-names",
        "production version lacking a parameter of the spec",
        ERROR,
        (r"model 'p-wrong-parameter-names'", r"ar1"),
        _production({"intercept": 50.0, "sigma2": 1.0}),
    ),
    Case(
        "p-negative-variance",
        "production version with a negative noise variance",
        ERROR,
        (r"model 'p-negative-variance'", r"sigma2"),
        _production({"ar1": 0.5, "intercept": 50.0, "sigma2": -1.0}),
    ),
    # -- healthy models --------------------------------------------------------------------------
    Case("ok-plain", "healthy AR(1)", AUDITED, (), _healthy),
    Case("ok-production", "healthy AR(1) with a production version", AUDITED, (), _healthy_with_production),
    Case("ok-exogenous", "healthy AR(1) with an exogenous input", AUDITED, (), _healthy_exog),
]


def build_fleet(root, archive) -> Fleet:
    """Write every case's data, parameter versions and the registry; returns the fleet."""
    c = Ctx(root, archive)
    c.fleet.source("main", "data/main.parquet", exogenous=("x", "x_absent"))
    for case in CASES:
        case.build(c, case)
    write_parquet(root / "data" / "main.parquet", long_table(c.main))
    c.fleet.write()
    return c.fleet


# ------------------------------------------------------------------------------------------
# one audit run over every case
# ------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def fleet_run(prefect_server, tmp_path_factory):
    from fitaudit.flows.audit import audit_flow

    root = tmp_path_factory.mktemp("bad-inputs")
    archive = root / "archive"
    fleet = build_fleet(root, archive)
    run = audit_flow(registry=str(root / "registry.yaml"), as_of=AS_OF, archive=str(archive))
    return fleet, run, results_of(run)


def _case_record(doc: dict, model_id: str) -> dict:
    """The record of a case's model (for a duplicate id: the rejected second entry)."""
    found = [m for m in doc["models"] if m["id"] == model_id]
    if len(found) > 1:
        found = [m for m in found if m["safe_id"] != m["id"]]
    assert len(found) == 1, f"{model_id}: {len(found)} records"
    return found[0]


def _check_registry_line(fleet: Fleet, case: Case, message: str) -> None:
    """A registry problem points into the case's own entry."""
    match = re.search(r"registry\.yaml:(\d+): models\[(\d+)\]", message)
    assert match, message
    line, index = int(match.group(1)), int(match.group(2))
    assert fleet.models[index]["id"] == case.id or (case.id == "dup-id" and index == 2)
    end = fleet.line_of(index + 1) if index + 1 < len(fleet.models) else 10**9
    assert fleet.line_of(index) <= line < end


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_case_verdict_and_message(fleet_run, case):
    fleet, _, doc = fleet_run
    record = _case_record(doc, case.id)
    expected = case.verdict if isinstance(case.verdict, tuple) else (case.verdict,)
    message = "\n".join(record["reasons"])
    assert record["verdict"] in expected, f"{case.what}: got {record['verdict']}: {message}"
    for pattern in case.patterns:
        assert re.search(pattern, message), f"{case.what}: {pattern!r} not in {message!r}"
    if case.id.startswith("reg-") or case.id == "dup-id":
        _check_registry_line(fleet, case, message)
    if record["verdict"] in ("error", "insufficient"):
        assert record["audit"] is None or record["audit"]["verdict"] == record["verdict"]
        assert not re.search(r"(?<![\w'-])nan(?![\w'-])", message)  # never a NaN number in place of a reason


def test_case_table_is_large_and_covers_both_verdicts():
    kinds = [c.verdict for c in CASES if isinstance(c.verdict, str)]
    assert len([c for c in CASES if not c.id.startswith("ok-")]) >= 30
    assert kinds.count(ERROR) >= 20 and kinds.count(SHORT) >= 3


def test_rest_of_the_run_completed_and_was_archived(fleet_run):
    fleet, run, doc = fleet_run
    counts = doc["summary"]
    assert counts["registered"] == len(fleet.models) == sum(counts[v] for v in VERDICTS)
    assert run["counts"] == {k: counts[k] for k in run["counts"]}
    healthy = ["ok-plain", "ok-production", "ok-exogenous", "folder-good-a", "folder-good-b"]
    verdicts = {m["id"]: m["verdict"] for m in doc["models"] if m["safe_id"] == m["id"]}
    assert all(verdicts[h] in AUDITED for h in healthy), {h: verdicts[h] for h in healthy}
    assert verdicts["dup-id"] in AUDITED  # the first of the duplicated entries is audited
    production = _case_record(doc, "ok-production")
    assert production["production_version"]["version"] == 2 and production["audit"]["production"]["status"] == "ok"
    assert verify_archive(run["archive"]) == []
    folder = pathlib.Path(run["report"]).parent
    pages = {p.name for p in (folder / "models").iterdir()}
    assert pages == {f"{m['safe_id']}.html" for m in doc["models"]}
    manifest = json.loads((folder / "manifest.json").read_text())
    assert {"emptyfile", "corrupt", "gone"} <= set(manifest["source_errors"])


def test_as_of_date_before_all_data_still_completes_the_run(fleet_run):
    from fitaudit.flows.audit import audit_flow

    fleet, _, _ = fleet_run
    early = AS_OF.replace(year=2025)  # months before the first observation (2026-01-01)
    run = audit_flow(registry=str(fleet.root / "registry.yaml"), as_of=early, archive=str(fleet.root / "archive-early"))
    doc = results_of(run)
    assert doc["summary"]["registered"] == len(fleet.models) == doc["summary"]["error"] + doc["summary"]["insufficient"]
    plain = _case_record(doc, "ok-plain")
    assert re.search(
        r"model 'ok-plain': source 'main', series 'ok-plain': has no rows between \S+ and 2025-08-28T23:59:59\. "
        r"Fix: check the as-of date",
        plain["reasons"][0],
    )
    assert verify_archive(run["archive"]) == []


# ------------------------------------------------------------------------------------------
# registry-level problems: the run refuses to start
# ------------------------------------------------------------------------------------------
GOOD_HEAD = "version: 1\npolicy: {justification: fixed in advance, approved_by: 'T. Approver, tests'}\n"
GOOD_SOURCES = "sources:\n  main: {uri: data/main.parquet, key: series, time: date, value: y, frequency: D}\n"
GOOD_MODELS = (
    "models:\n  - {id: m1, owner: tests, tier: 2, source: main, series: s, spec: {family: arima, order: [1, 0, 0]},"
    " noise: normal, windows: {fit: 100, audit: 20}}\n"
)

FATAL = [
    ("yaml-syntax", GOOD_HEAD + GOOD_SOURCES + "models:\n  - id: [m1\n", r"registry\.yaml:\d+: YAML syntax error"),
    (
        "object-tag",
        GOOD_HEAD + GOOD_SOURCES + GOOD_MODELS + "extra: !!python/object/apply:os.system ['touch pwned']\n",
        r"registry\.yaml:7: the tag 'tag:yaml\.org,2002:python/object/apply:os\.system' is refused",
    ),
    (
        "unknown-top-key",
        GOOD_HEAD + GOOD_SOURCES + GOOD_MODELS + "modles: []\n",
        r"registry\.yaml:7: modles: unknown key 'modles' \(did you mean 'models'\?\)",
    ),
    (
        "version",
        GOOD_HEAD.replace("version: 1", "version: 2") + GOOD_SOURCES + GOOD_MODELS,
        r"registry\.yaml:1: version: expected 1",
    ),
    (
        "no-approver",
        GOOD_HEAD.replace(", approved_by: 'T. Approver, tests'", "") + GOOD_SOURCES + GOOD_MODELS,
        r"registry\.yaml:2: policy\.approved_by: missing; "
        r"every threshold needs a written justification and an approver",
    ),
    (
        "models-not-a-list",
        GOOD_HEAD + GOOD_SOURCES + "models: {id: m1}\n",
        r"registry\.yaml:5: models: expected a list of model entries",
    ),
    (
        "sources-not-a-mapping",
        GOOD_HEAD + "sources: [main]\n" + GOOD_MODELS,
        r"registry\.yaml:3: sources: expected a mapping of source names",
    ),
    (
        "level-out-of-range",
        GOOD_HEAD.replace("{justification", "{level: 5, justification") + GOOD_SOURCES + GOOD_MODELS,
        r"registry\.yaml:2: policy\.level: expected a number in the open interval \(0, 0\.5\), got 5",
    ),
    ("empty-file", "", r"registry\.yaml:1: the registry is empty"),
]


@pytest.mark.parametrize("text,pattern", [f[1:] for f in FATAL], ids=[f[0] for f in FATAL])
def test_registry_level_problem_refuses_the_run(tmp_path, text, pattern):
    path = tmp_path / "registry.yaml"
    path.write_text(text)
    with pytest.raises(RegistryError) as info:
        load_registry(path)
    assert any(re.search(pattern, str(p)) for p in info.value.problems), [str(p) for p in info.value.problems]
    assert not (tmp_path / "pwned").exists()
    assert {str(p) for p in info.value.problems} <= {
        str(p) for p in check_registry(path)
    }  # check adds entry-level ones


@pytest.fixture
def restored_environ():
    """``fitaudit`` configures Prefect through os.environ; put it back afterwards."""
    before = dict(os.environ)
    yield
    os.environ.clear()
    os.environ.update(before)


def test_refused_run_exits_2_lists_every_problem_and_writes_nothing(prefect_server, tmp_path, capsys, restored_environ):
    from fitaudit.flows.cli import main

    text = (
        GOOD_HEAD.replace("version: 1", "version: 3").replace("{justification", "{level: 5, justification")
        + "colour: teal\n"
        + "sources: [main]\n"
        + "models: {id: m1}\n"
    )
    path = tmp_path / "registry.yaml"
    path.write_text(text)
    archive = tmp_path / "archive"
    code = main(["run", str(path), "--archive", str(archive), "--as-of", AS_OF.isoformat(), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    expected = [
        r"registry\.yaml:1: version: expected 1",
        r"registry\.yaml:2: policy\.level: expected a number",
        r"registry\.yaml:3: colour: unknown key 'colour'",
        r"registry\.yaml:4: sources: expected a mapping",
        r"registry\.yaml:5: models: expected a list",
    ]
    for pattern in expected:
        assert re.search(pattern, err), (pattern, err)
    assert re.search(r"has 5 problem\(s\); the audit cannot start until they are fixed", err)
    assert not archive.exists() or not any(archive.rglob("*"))
    assert main(["registry", "check", str(path)]) == 2
    assert len(re.findall(r"registry\.yaml:\d+: ", capsys.readouterr().out)) == 5
