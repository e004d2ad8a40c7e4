"""The benchmark fleet: a generated extract, registry and production parameter versions.

:func:`write_fleet` writes ``n`` daily series of ``N_DAYS`` = 730 observations ending on ``AS_OF``:

* 80 % seasonal ARIMA (1,0,1)(0,1,1)7 with one exogenous input (``temp_c``, the daily maximum
  temperature of the series' region; 25 series share a region), normal noise;
* 20 % Holt-Winters exponential smoothing with a damped additive trend and an additive weekly
  season (ETS(A,Ad,A), period 7), normal noise.

Every model has a production parameter version (written with
:func:`fitaudit.tasks.params.write_version` and promoted): the parameters the series were
generated with.  So that every verdict path runs, a few series change in known ways:

* every 10th series (from the 4th) has three times the innovation standard deviation in the last
  28 days: the production check fails and the refit absorbs it (``refit`` expected);
* every 50th series (from the 7th) has a weekly pattern that grows over the last year which its
  model does not describe well (``respecify`` candidates, which also runs the candidate search).

The extract is a Parquet dataset folder with one file per ``SERIES_PER_FILE`` series (sorted by
key and date).  Everything follows from the seed, so a fleet is reproducible.
"""

from __future__ import annotations

import datetime as dt
import pathlib
import textwrap
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from fitaudit.core.models import model_from_dict
from fitaudit.tasks.params import promote, write_version

__all__ = [
    "AS_OF",
    "N_DAYS",
    "AUDIT_WINDOW",
    "ARIMA_SPEC",
    "SMOOTHING_SPEC",
    "FleetPaths",
    "FleetSeries",
    "model_ids",
    "fleet_series",
    "write_fleet",
]

AS_OF = dt.date(2026, 11, 30)
N_DAYS = 730
AUDIT_WINDOW = 56
SEED = 20261207
ARIMA_SHARE = 0.8
REGION_SIZE = 25
SERIES_PER_FILE = 1000
ARIMA_SPEC = {"family": "arima", "order": [1, 0, 1], "seasonal": [0, 1, 1, 7], "trend": "n"}
SMOOTHING_SPEC = {"family": "smoothing", "trend": "add", "damped": True, "seasonal": "add", "period": 7}


@dataclass(frozen=True)
class FleetPaths:
    """Where a generated fleet lives."""

    root: str
    registry: str
    archive: str
    data: str
    model_ids: tuple


@dataclass(frozen=True)
class FleetSeries:
    """One generated series with its model entry and production parameters."""

    model_id: str
    key: str
    spec: dict
    y: np.ndarray
    exog: dict
    params: dict


def _days() -> np.ndarray:
    return np.datetime64(AS_OF.isoformat(), "D") - np.arange(N_DAYS)[::-1]


def _temperature(rng: np.random.Generator, days: np.ndarray) -> np.ndarray:
    doy = (days - days.astype("datetime64[Y]")).astype(int)
    shocks = rng.normal(0.0, 2.0, days.size)
    wobble = np.zeros(days.size)
    for t in range(1, days.size):  # a short AR(1) recursion per region (generation only)
        wobble[t] = 0.6 * wobble[t - 1] + shocks[t]
    return np.round(20.0 + 8.0 * np.cos(2 * np.pi * (doy - 20) / 365.25) + wobble, 1)


def _arima_series(rng: np.random.Generator, temp: np.ndarray, scale: np.ndarray) -> tuple[np.ndarray, dict]:
    params = {
        "ar1": float(0.35 + 0.3 * rng.random()),
        "ma1": float(-0.1 - 0.2 * rng.random()),
        "sma1": float(-0.5 - 0.3 * rng.random()),
        "x:temp_c": float(0.2 + 0.3 * rng.random()),
        "sigma2": float((0.6 + 0.6 * rng.random()) ** 2),
    }
    innovations = rng.standard_normal(N_DAYS) * np.sqrt(params["sigma2"]) * scale
    y = (
        40.0
        + 20.0 * rng.random()
        + model_from_dict(ARIMA_SPEC).simulate(params, N_DAYS, rng, exog={"temp_c": temp}, innovations=innovations)
    )
    return y, params


def _smoothing_series(rng: np.random.Generator, scale: np.ndarray) -> tuple[np.ndarray, dict]:
    season = np.array([0.5, 0.4, 0.3, 0.2, 0.1, -0.7, -0.8]) * (1.0 + rng.random())
    params = {
        "alpha": float(0.2 + 0.2 * rng.random()),
        "beta": 0.02,
        "gamma": float(0.05 + 0.1 * rng.random()),
        "phi": 0.9,
        "l0": float(30.0 + 20.0 * rng.random()),
        "b0": 0.01,
        **{f"s{k}": float(season[k]) for k in range(6)},
        "sigma2": float(0.3 + 0.4 * rng.random()),
    }
    innovations = rng.standard_normal(N_DAYS) * np.sqrt(params["sigma2"]) * scale
    return model_from_dict(SMOOTHING_SPEC).simulate(params, N_DAYS, rng, innovations=innovations), params


def model_ids(n: int) -> list[str]:
    """Ids of the first ``n`` models of a fleet (as :func:`fleet_series` names them)."""
    return [f"m-s{i:05d}" for i in range(n)]


def fleet_series(n: int, seed: int = SEED) -> list[FleetSeries]:
    """The first ``n`` series of the fleet (deterministic in ``seed``; a prefix of a larger fleet)."""
    days = _days()
    out: list[FleetSeries] = []
    temps: dict[int, np.ndarray] = {}
    weekly = np.array([1.0, 0.9, 0.8, 0.9, 1.0, -2.2, -2.4])
    for i in range(n):
        rng = np.random.default_rng([seed, i])
        region = i // REGION_SIZE
        if region not in temps:
            temps[region] = _temperature(np.random.default_rng([seed, 10**9 + region]), days)
        scale = np.ones(N_DAYS)
        if i % 10 == 3:
            scale[-28:] = 3.0
        key = f"s{i:05d}"  # model id "m-" + key, as model_ids() lists them
        if rng.random() < ARIMA_SHARE:
            y, params = _arima_series(rng, temps[region], scale)
            spec, exog = ARIMA_SPEC, {"temp_c": temps[region]}
        else:
            y, params = _smoothing_series(rng, scale)
            spec, exog = SMOOTHING_SPEC, {}
        if i % 50 == 6:
            ramp = np.clip((np.arange(N_DAYS) - (N_DAYS - 365)) / 200.0, 0.0, 1.0)
            y = y + 2.0 * np.sqrt(params["sigma2"]) * ramp * weekly[np.arange(N_DAYS) % 7] * np.cos(
                np.arange(N_DAYS) / 30.0
            )
        out.append(
            FleetSeries(model_id=f"m-{key}", key=key, spec=dict(spec), y=np.round(y, 3), exog=exog, params=params)
        )
    return out


def _registry_text(series: list[FleetSeries], replicates: int) -> str:
    head = textwrap.dedent(
        f"""\
        # Benchmark fleet generated by bench/fleet.py (synthetic series).
        version: 1
        policy:
          level: 0.05
          multiple_testing: bh
          fdr_q: 0.10
          persistence: {{k: 2, n: 3}}
          calibration: simulated
          replicates: {replicates}
          seed: {SEED}
          refit_policy: approval
          justification: benchmark fleet; 5 % per check, Benjamini-Hochberg at q = 0.10
          approved_by: bench/fleet.py
        sources:
          fleet:
            uri: data/fleet
            key: series
            time: date
            value: y
            exogenous: [temp_c]
            frequency: D
        models:
        """
    )
    lines = [head]
    for s in series:
        spec = ", ".join(f"{k}: {_yaml(v)}" for k, v in s.spec.items())
        lines.append(
            f"  - id: {s.model_id}\n    owner: benchmark\n    tier: 2\n    description: synthetic series {s.key}\n"
            f"    source: fleet\n    series: {s.key}\n"
            + ("    exogenous: [temp_c]\n" if s.exog else "")
            + f"    spec: {{{spec}}}\n    noise: normal\n    windows: {{fit: {N_DAYS}, audit: {AUDIT_WINDOW}}}\n"
            "    last_validated: 2025-11-01\n"
        )
    return "".join(lines)


def _yaml(v) -> str:
    if isinstance(v, list):
        return "[" + ", ".join(_yaml(x) for x in v) + "]"
    if isinstance(v, bool):
        return "true" if v else "false"
    return str(v)


def _write_extract(folder: pathlib.Path, series: list[FleetSeries]) -> None:
    folder.mkdir(parents=True, exist_ok=True)
    days = _days().astype("datetime64[us]")
    for part, start in enumerate(range(0, len(series), SERIES_PER_FILE)):
        chunk = series[start : start + SERIES_PER_FILE]
        temp = [s.exog["temp_c"] if s.exog else _temperature_of_region(series, s) for s in chunk]
        table = pa.table(
            {
                "series": pa.array(np.repeat([s.key for s in chunk], N_DAYS)),
                "date": pa.array(np.tile(days, len(chunk))),
                "y": pa.array(np.concatenate([s.y for s in chunk])),
                "temp_c": pa.array(np.concatenate(temp)),
            }
        )
        pq.write_table(table, folder / f"part-{part:04d}.parquet")


def _temperature_of_region(series: list[FleetSeries], s: FleetSeries) -> np.ndarray:
    """Smoothing series carry their region's temperature column too (unused by their model)."""
    i = int(s.key[1:])
    region = i // REGION_SIZE
    for other in series[region * REGION_SIZE : (region + 1) * REGION_SIZE]:
        if other.exog:
            return other.exog["temp_c"]
    return _temperature(np.random.default_rng([SEED, 10**9 + region]), _days())


def write_fleet(out: str | pathlib.Path, n: int, *, replicates: int = 999) -> FleetPaths:
    """Write the extract, registry and promoted production versions of an ``n``-series fleet."""
    root = pathlib.Path(out).resolve()
    series = fleet_series(n)
    _write_extract(root / "data" / "fleet", series)
    registry = root / "registry.yaml"
    registry.write_text(_registry_text(series, replicates))
    archive = root / "archive"
    for s in series:
        v = write_version(
            archive,
            s.model_id,
            spec=model_from_dict(s.spec).to_dict(),
            noise={"law": "normal", "shape": None},
            params=s.params,
            status="candidate",
            created_by="bench/fleet.py",
            lineage={"note": "generating parameters"},
            created_at="2025-11-01T09:00:00Z",
        )
        promote(archive, s.model_id, v.version, approved_by="bench/fleet.py", note="benchmark production version")
    return FleetPaths(
        root=str(root),
        registry=str(registry),
        archive=str(archive),
        data=str(root / "data"),
        model_ids=tuple(s.model_id for s in series),
    )
