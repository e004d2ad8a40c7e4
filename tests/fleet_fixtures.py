"""Small fleets for the reliability tests: registry YAML, Parquet extracts and parameter versions.

A :class:`Fleet` collects source and model entries, writes the registry with PyYAML (so a case can
put any value, hostile or wrong, into any field) and knows the line of every model entry.  The
series are short daily AR(1) paths so that a whole fleet audits in seconds; the policy uses the
smallest number of replicates the registry accepts (99).
"""

from __future__ import annotations

import datetime as dt
import json
import pathlib
from dataclasses import dataclass, field

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import yaml
from scipy.signal import lfilter

from fitaudit.core.models import model_from_dict
from fitaudit.core.vocabulary import ADJUDICATED_VERDICTS
from fitaudit.tasks.params import promote, write_version

START = dt.date(2026, 1, 1)
N_DAYS = 240
AS_OF = START + dt.timedelta(days=N_DAYS - 1)  # 2026-08-28, the last day of data
FIT, AUDIT = 200, 40
AR1 = {"family": "arima", "order": [1, 0, 0], "trend": "c"}
POLICY = {
    "level": 0.05,
    "multiple_testing": "bh",
    "fdr_q": 0.10,
    "persistence": {"k": 2, "n": 3},
    "calibration": "simulated",
    "replicates": 99,
    "seed": 8,
    "refit_policy": "approval",
    "justification": "test fleet: 5 % per check, Benjamini-Hochberg at q = 0.10",
    "approved_by": "T. Tester, reliability tests",
}
AUDITED = ADJUDICATED_VERDICTS


def days(n: int = N_DAYS, start: dt.date = START) -> np.ndarray:
    """``n`` consecutive days as naive ``datetime64[us]`` midnights."""
    return (np.datetime64(start.isoformat(), "D") + np.arange(n)).astype("datetime64[us]")


def ar1(
    rng: np.random.Generator, n: int = N_DAYS, phi: float = 0.5, mu: float = 50.0, sigma: float = 1.0
) -> np.ndarray:
    """A stationary Gaussian AR(1) path around ``mu`` (100 burn-in values dropped), rounded to 1e-3."""
    shocks = rng.normal(0.0, sigma, n + 100)
    return np.round(mu + lfilter([1.0], [1.0, -phi], shocks)[100:], 3)


def long_table(series: dict[str, dict[str, np.ndarray]], key: str = "series", time: str = "date") -> pa.Table:
    """Long-format table from ``{key: {"date": times, "y": values, ...}}`` (all series share columns)."""
    names = list(next(iter(series.values())))
    columns: dict[str, list] = {key: [], **{c: [] for c in names}}
    for k, cols in series.items():
        n = len(cols[time])
        columns[key] += [k] * n
        for c in names:
            columns[c].append(np.asarray(cols[c]))
    out = {key: pa.array(columns[key], pa.string())}
    for c in names:
        values = np.concatenate(columns[c])
        if values.dtype.kind == "M":
            out[c] = pa.array(values, mask=np.isnat(values))  # NaT is a null timestamp
        else:
            out[c] = pa.array(values) if values.dtype != object else pa.array(list(values))
    return pa.table(out)


def write_parquet(path: pathlib.Path, table: pa.Table) -> pathlib.Path:
    """Write ``table`` to ``path`` (parents created)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path)
    return path


def promote_production(
    archive: pathlib.Path, model_id: str, spec: dict, params: dict, noise: dict | None = None
) -> int:
    """Write a candidate parameter version and promote it; returns the production version number."""
    noise = noise or {"law": "normal", "shape": None}
    v = write_version(
        archive,
        model_id,
        spec=spec,
        noise=noise,
        params=params,
        status="candidate",
        created_by="T. Tester, reliability tests",
        lineage={"note": "test fixture"},
        created_at="2025-12-31T09:00:00Z",
    )
    return promote(
        archive, model_id, v.version, approved_by="T. Approver, reliability tests", note="test fixture"
    ).version


def fitted_params(spec: dict, y: np.ndarray, exog: dict | None = None) -> dict:
    """Parameters of ``spec`` fitted to ``y`` (the 'old' production fit of a fixture)."""
    model = model_from_dict(spec)
    return dict(model.fit(y, exog).params)


@dataclass
class Fleet:
    """Source and model entries of a test registry, written under ``root``."""

    root: pathlib.Path
    sources: dict = field(default_factory=dict)
    models: list = field(default_factory=list)
    policy: dict = field(default_factory=lambda: dict(POLICY))

    def source(
        self,
        name: str,
        uri: str,
        *,
        key: str = "series",
        time: str = "date",
        value: str = "y",
        exogenous: tuple = (),
        frequency: str = "D",
        **extra,
    ) -> None:
        """Declare an extract source (``extra`` keys go into the entry as given)."""
        entry = {"uri": uri, "key": key, "time": time, "value": value, "frequency": frequency}
        if exogenous:
            entry["exogenous"] = list(exogenous)
        self.sources[name] = {**entry, **extra}

    def model(
        self,
        id,
        source: str,
        series,
        *,
        spec: dict | None = None,
        noise="normal",
        fit: int = FIT,
        audit: int = AUDIT,
        owner="Reliability tests",
        tier=2,
        **extra,
    ) -> dict:
        """Register a model entry (``extra`` keys go into the entry as given, unknown ones included)."""
        entry = {
            "id": id,
            "owner": owner,
            "tier": tier,
            "source": source,
            "series": series,
            "spec": dict(spec or AR1),
            "noise": noise,
            "windows": {"fit": fit, "audit": audit},
            **extra,
        }
        self.models.append(entry)
        return entry

    def text(self) -> str:
        """The registry document."""
        doc = {"version": 1, "policy": self.policy, "sources": self.sources, "models": self.models}
        return yaml.safe_dump(doc, sort_keys=False, allow_unicode=True, width=10_000)

    def write(self, name: str = "registry.yaml") -> pathlib.Path:
        """Write the registry next to the data; returns its path."""
        path = self.root / name
        path.write_text(self.text(), encoding="utf-8")
        return path

    def line_of(self, index: int) -> int:
        """1-based line of ``models[index]``'s first key in :meth:`text` (found by counting entries)."""
        starts = [i + 1 for i, line in enumerate(self.text().splitlines()) if line.startswith("- id:")]
        return starts[index]


def results_of(run: dict) -> dict:
    """The ``results.json`` document of a finished ``audit_flow`` run."""
    return json.loads((pathlib.Path(run["report"]).parent / "results.json").read_bytes())


def run_files(run: dict) -> list[pathlib.Path]:
    """Every file of a published run folder."""
    folder = pathlib.Path(run["report"]).parent
    return sorted(p for p in folder.rglob("*") if p.is_file())


# --------------------------------------------------------------------------------------------
# user mean functions that misbehave (NonlinearAR(function="fleet_fixtures:<name>"))
# --------------------------------------------------------------------------------------------
def mean_exits(theta, lags, exog):
    """A mean function that calls sys.exit (BaseException, not Exception)."""
    raise SystemExit(3)


def mean_divides_by_zero(theta, lags, exog):
    """A mean function with an arithmetic bug."""
    return lags[:, 0] / 0 if theta[0] > 1e9 else 1 // 0


def mean_not_finite(theta, lags, exog):
    """A mean function whose predictions are all NaN."""
    return np.full(lags.shape[0], np.nan)
