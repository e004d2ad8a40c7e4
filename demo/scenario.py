"""The demo scenario: an invented water board's forecasting fleet, with planted problems.

*Brackwater Valley Water Board* (fiction) forecasts daily drinking-water demand for 36 supply
districts (megalitres per day, with the zone's daily maximum temperature as an exogenous input),
daily pumping energy of 6 pumping stations and a leakage index of 2 network sectors.  Three years
of daily data end on 30 November 2026 (early summer in the valley).  Production parameter versions
were fitted on data up to 31 October 2025 and promoted on 1 November 2025.

Some forecasts come from outside and are audited as stated (forecast entries: fitaudit refits
nothing of them).  An energy supplier (Northgrid Forecasting, fictional) sends day-ahead quantile
forecasts (5, 25, 50, 75 and 95 %) of the energy of pumping stations 1 to 3, issued at 18:00 the
evening before (``data/supplier.parquet``, with the actuals); the network team's notebook states
one-step mean forecasts of sector 1's leakage index with a fixed standard deviation of 0.5
(``data/notebook.parquet``).

Planted so that every verdict appears in the final audit (as of 2026-11-30):

=========  =====================================================================  ==============
district   what happened                                                          verdict
=========  =====================================================================  ==============
d-07       demand became much more volatile on 3 November 2026, after the         refit
           previous audit (2 November)
d-22       the same, since 1 March 2026, so refits were needed audit after audit  respecify (escalated)
d-13       new model (no production version yet) whose shocks are heavy-tailed    respecify
           (student-t, 2.2 df) although it is registered as normal
d-19       a weekly pattern grew over the last year; the model has no season      respecify
d-25       connected on 1 June 2026: too short for its fit window                 insufficient
d-31       a meter failure left a missing reading on 20 November 2026            error
d-32       the extract holds 18 November 2026 twice                               error
d-40       registry entry names an unknown noise law                              error
supplier   pump-02: the supplier's stated quantiles are half as wide as they      refit (the owner
pump-02    should be since 4 November 2026 (after the previous audit)             re-estimates)
=========  =====================================================================  ==============

The other forecast entries (the supplier's pumps 1 and 3, the notebook's leakage forecasts) pass.

Everything is generated from a fixed seed, so the demo is byte-for-byte reproducible.
"""

from __future__ import annotations

import datetime as dt
import pathlib
import textwrap

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
from scipy import stats

from fitaudit.core.models import ForecastModel, model_from_dict
from fitaudit.tasks.params import promote, write_version

__all__ = ["DEMO_AS_OF", "DEMO_START", "write_demo", "demo_as_of_dates"]

DEMO_START = dt.date(2023, 12, 1)
DEMO_AS_OF = dt.date(2026, 11, 30)
PRODUCTION_FIT_END = dt.date(2025, 10, 31)
SEED = 20261130

ZONES = {"north": range(1, 10), "east": range(10, 19), "south": range(19, 28), "west": range(28, 37)}
SEASONAL = {"family": "arima", "order": [1, 0, 1], "seasonal": [0, 1, 1, 7], "trend": "n"}
STATIONARY = {"family": "arima", "order": [1, 0, 0], "seasonal": [1, 0, 0, 7], "trend": "c"}
PLAIN_AR = {"family": "arima", "order": [2, 0, 0], "seasonal": [0, 0, 0, 0], "trend": "c"}


def demo_as_of_dates() -> list[dt.date]:
    """The demo's audits: 8 and 4 weeks before the final as-of date, and the final one."""
    return [DEMO_AS_OF - dt.timedelta(days=56), DEMO_AS_OF - dt.timedelta(days=28), DEMO_AS_OF]


def _days() -> np.ndarray:
    n = (DEMO_AS_OF - DEMO_START).days + 1
    return np.datetime64(DEMO_START.isoformat(), "D") + np.arange(n)


def _model(spec: dict) -> ForecastModel:
    return model_from_dict(spec)


def _temperature(days: np.ndarray, rng: np.random.Generator, offset: float) -> np.ndarray:
    """Daily maximum temperature of a zone (southern hemisphere: warm in January)."""
    doy = (days - days.astype("datetime64[Y]")).astype(int)
    noise = np.zeros(days.size)
    shocks = rng.normal(0, 2.2, days.size)
    for t in range(1, days.size):
        noise[t] = 0.65 * noise[t - 1] + shocks[t]
    return np.round(22.0 + offset + 7.5 * np.cos(2 * np.pi * (doy - 20) / 365.25) + noise, 1)


def _district(i: int, days: np.ndarray, temp: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, dict, dict]:
    """One district's demand, its registry spec and noise law."""
    n = days.size
    base = 30.0 + 25.0 * rng.random()
    sigma = 0.6 + 0.5 * rng.random()
    beta = 0.25 + 0.3 * rng.random()
    exog = {"temp_c": temp}
    noise = {"law": "normal"}
    if i in (7, 22):
        spec = dict(STATIONARY)
        params = {"ar1": 0.55, "sar1": 0.35, "intercept": base, "x:temp_c": beta, "sigma2": sigma**2}
        scale = np.full(n, sigma)
        change = np.datetime64("2026-11-03" if i == 7 else "2026-03-01")
        scale[days >= change] *= 3.0 if i == 7 else 2.0
        y = _model(spec).simulate(params, n, rng, exog=exog, innovations=rng.normal(0, 1, n) * scale)
    elif i == 19:
        spec = dict(PLAIN_AR)
        params = {"ar1": 0.5, "ar2": 0.15, "intercept": base, "x:temp_c": beta, "sigma2": sigma**2}
        y = _model(spec).simulate(params, n, rng, exog=exog)
        ramp = np.clip((np.arange(n) - (n - 420)) / 300.0, 0.0, 1.0)
        weekly = np.array([1.0, 0.9, 0.8, 0.9, 1.0, -2.2, -2.4])
        y = y + 1.6 * sigma * ramp * weekly[(days.astype(int) + 3) % 7]
    else:
        spec = dict(SEASONAL)
        params = {
            "ar1": 0.45 + 0.2 * rng.random(),
            "ma1": -0.2,
            "sma1": -0.55 - 0.2 * rng.random(),
            "x:temp_c": beta,
            "sigma2": sigma**2,
        }
        innovations = None
        if i in (3, 11, 13):
            df = 5.0 if i != 13 else 2.2
            t = rng.standard_t(df, n)
            innovations = sigma * t / np.sqrt(df / (df - 2)) if df > 2 else sigma * t
            if i != 13:
                noise = {"law": "student-t", "df": 5}
        y = base + _model(spec).simulate(params, n, rng, exog=exog, innovations=innovations)
    return np.round(y, 3), spec, noise


def _station(j: int, n: int, rng: np.random.Generator) -> tuple[np.ndarray, dict, dict]:
    spec = {"family": "smoothing", "trend": "add", "damped": True, "seasonal": "add", "period": 7}
    season = np.array([0.5, 0.4, 0.3, 0.2, 0.1, -0.7, -0.8]) * (1 + rng.random())
    params = {
        "alpha": 0.3,
        "beta": 0.02,
        "gamma": 0.1,
        "phi": 0.9,
        "l0": 40 + 10 * rng.random(),
        "b0": 0.01,
        **{f"s{k}": float(season[k]) for k in range(6)},
        "sigma2": 0.5 + 0.3 * rng.random(),
    }
    return np.round(_model(spec).simulate(params, n, rng), 3), spec, params


LEAK_SPEC = {"family": "nonlinear-ar", "function": "setar", "lags": [1, 2], "delay": 1}
LEAK_PARAMS = {
    "c1": 1.0,
    "ar1_1": 0.6,
    "ar1_2": 0.1,
    "c2": 3.0,
    "ar2_1": 0.3,
    "ar2_2": -0.1,
    "threshold": 3.5,
    "delay": 1.0,
    "sigma2": 0.25,
}
LEAK_LEVEL = 2.0  # the index is the simulated threshold process shifted by this much


def _leakage(n: int, rng: np.random.Generator) -> tuple[np.ndarray, dict]:
    spec = dict(LEAK_SPEC)
    model = _model(spec)
    return np.round(model.simulate(LEAK_PARAMS, n, rng) + LEAK_LEVEL, 3), spec


#: The supplier's quantile levels and their columns; its forecasts start here.
SUPPLIER_LEVELS = {"q05": 0.05, "q25": 0.25, "q50": 0.5, "q75": 0.75, "q95": 0.95}
OUTSIDE_START = np.datetime64("2026-03-01")
#: From this day the supplier's stated spread is half the true one (planted: pump-02).
NARROW_FROM = np.datetime64("2026-11-04")


def _supplier(days: np.ndarray, stations: dict) -> dict:
    """The supplier's day-ahead quantile forecasts of stations 1 to 3: the one-step predictive
    law of the true model (mean y_t - e_t, standard deviation sigma), issued at 18:00 the day
    before; from :data:`NARROW_FROM` on the spread it states for pump-02 is half the true one."""
    keep = days >= OUTSIDE_START
    cols = {"asset": [], "date": [], "energy_mwh": [], **{c: [] for c in SUPPLIER_LEVELS}, "issued_at": []}
    for name in ("pump-01", "pump-02", "pump-03"):
        y, spec, params = stations[name]
        mean = y - _model(spec).errors(y, params)
        sd = np.full(y.size, float(np.sqrt(params["sigma2"])))
        if name == "pump-02":
            sd[days >= NARROW_FROM] *= 0.5
        cols["asset"] += [name] * int(keep.sum())
        cols["date"] += list(days[keep])
        cols["energy_mwh"] += list(y[keep])
        for c, level in SUPPLIER_LEVELS.items():
            cols[c] += list(np.round(mean + sd * float(stats.norm.ppf(level)), 3)[keep])
        cols["issued_at"] += list(days[keep].astype("datetime64[s]") - np.timedelta64(6, "h"))
    return cols


def _notebook(days: np.ndarray, leak: np.ndarray) -> dict:
    """The network team's one-step mean forecasts of sector 1's leakage index (the true threshold
    model's conditional mean); the notebook states a fixed standard deviation of 0.5."""
    keep = days >= OUTSIDE_START
    mean = leak - _model(LEAK_SPEC).errors(leak - LEAK_LEVEL, LEAK_PARAMS)
    return {
        "sector": ["leak-01"] * int(keep.sum()),
        "date": list(days[keep]),
        "leakage": list(leak[keep]),
        "fc_mean": list(np.round(mean, 3)[keep]),
    }


OUTSIDE_ENTRIES = """\
  - id: supplier-pump-01
    owner: "Energy trading (supplier forecasts, T. Lindqvist)"
    tier: 3
    description: "Northgrid's day-ahead quantile forecasts of the energy of station pump-01, MWh"
    source: supplier
    series: pump-01
    forecasts:
      quantiles: {"0.05": q05, "0.25": q25, "0.5": q50, "0.75": q75, "0.95": q95}
      issued: issued_at
      period: 7
    windows: {audit: 56}
  - id: supplier-pump-02
    owner: "Energy trading (supplier forecasts, T. Lindqvist)"
    tier: 3
    description: "Northgrid's day-ahead quantile forecasts of the energy of station pump-02, MWh"
    source: supplier
    series: pump-02
    forecasts:
      quantiles: {"0.05": q05, "0.25": q25, "0.5": q50, "0.75": q75, "0.95": q95}
      issued: issued_at
      period: 7
    windows: {audit: 56}
  - id: supplier-pump-03
    owner: "Energy trading (supplier forecasts, T. Lindqvist)"
    tier: 3
    description: "Northgrid's day-ahead quantile forecasts of the energy of station pump-03, MWh"
    source: supplier
    series: pump-03
    forecasts:
      quantiles: {"0.05": q05, "0.25": q25, "0.5": q50, "0.75": q75, "0.95": q95}
      issued: issued_at
      period: 7
    windows: {audit: 56}
  - id: notebook-leak-01
    owner: "Network operations (K. Mbeki)"
    tier: 2
    description: "The network notebook's one-step forecasts of sector 1's leakage index"
    source: notebook
    series: leak-01
    forecasts: {mean: fc_mean, scale: 0.5}
    windows: {audit: 56}
"""


def _registry_text(entries: list[dict]) -> str:
    head = textwrap.dedent(
        """\
        # Brackwater Valley Water Board (an invented organisation): the model registry of its
        # demand, energy and leakage forecasts.  Generated by `fitaudit demo`.
        version: 1
        policy:
          level: 0.05
          multiple_testing: bh
          fdr_q: 0.10
          persistence: {k: 2, n: 3}
          calibration: simulated
          replicates: 499
          seed: 20261130
          refit_policy: approval
          days_to_act: {tier_1: 7, tier_2: 14, tier_3: 28}
          justification: >-
            5 % per check with Benjamini-Hochberg at q = 0.10 across the fleet keeps false alarms rare
            in weekly audits of about fifty models; two refits in three audits escalate to a review.
          approved_by: "M. Achterberg, Head of Model Risk (fictional)"
        sources:
          demand:
            uri: data/demand
            key: district
            time: date
            value: demand_ml
            exogenous: [temp_c]
            frequency: D
          network:
            uri: data/network.parquet
            key: asset
            time: date
            value: reading
            frequency: D
          supplier:
            uri: data/supplier.parquet
            key: asset
            time: date
            value: energy_mwh
            forecasts: [q05, q25, q50, q75, q95, issued_at]
            frequency: D
          notebook:
            uri: data/notebook.parquet
            key: sector
            time: date
            value: leakage
            forecasts: [fc_mean]
            frequency: D
        models:
        """
    )
    lines = [head]
    for e in entries:
        lines.append(f"  - id: {e['id']}\n")
        for key in ("owner", "tier", "description", "source", "series"):
            value = e[key]
            lines.append(f"    {key}: {value!r}\n" if isinstance(value, str) else f"    {key}: {value}\n")
        if e.get("exogenous"):
            lines.append(f"    exogenous: [{', '.join(e['exogenous'])}]\n")
        spec = ", ".join(f"{k}: {_yaml_value(v)}" for k, v in e["spec"].items())
        lines.append(f"    spec: {{{spec}}}\n")
        noise = e["noise"]
        lines.append(
            f"    noise: {noise['law']}\n"
            if len(noise) == 1
            else f"    noise: {{{', '.join(f'{k}: {_yaml_value(v)}' for k, v in noise.items())}}}\n"
        )
        lines.append(f"    windows: {{fit: {e['fit']}, audit: {e['audit']}}}\n")
        lines.append(f"    last_validated: {e['last_validated']}\n")
    return "".join(lines) + OUTSIDE_ENTRIES


def _yaml_value(v) -> str:
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_yaml_value(x) for x in v) + "]"
    if isinstance(v, bool):
        return "true" if v else "false"
    if v is None:
        return "null"
    if isinstance(v, str):
        return v
    return repr(v)


def write_demo(out: str | pathlib.Path) -> dict:
    """Write the demo extract (Parquet), registry and production parameter versions under ``out``.

    Returns paths: ``registry``, ``archive``, ``data``.
    """
    out = pathlib.Path(out)
    rng = np.random.default_rng(SEED)
    days = _days()
    n = days.size
    data = out / "data"
    (data / "demand").mkdir(parents=True, exist_ok=True)
    entries: list[dict] = []
    fits: dict[str, tuple] = {}
    owners = {
        "north": "North zone forecasting (R. Okafor)",
        "east": "East zone forecasting (L. Brandt)",
        "south": "South zone forecasting (P. Nair)",
        "west": "West zone forecasting (S. Iwu)",
    }
    for z, (zone, ids) in enumerate(ZONES.items()):
        temp = _temperature(days, rng, offset=z - 1.5)
        cols = {"district": [], "date": [], "demand_ml": [], "temp_c": []}
        for i in ids:
            name = f"d-{i:02d}"
            y, spec, noise = _district(i, days, temp, rng)
            t_days, t_temp = days, temp
            if i == 25:  # connected recently
                keep = days >= np.datetime64("2026-06-01")
                t_days, y, t_temp = days[keep], y[keep], temp[keep]
            if i == 31:  # meter failure
                y = y.copy()
                y[t_days == np.datetime64("2026-11-20")] = np.nan
            if i == 32:  # exported twice
                dup = np.nonzero(t_days == np.datetime64("2026-11-18"))[0][0]
                t_days = np.insert(t_days, dup, t_days[dup])
                y = np.insert(y, dup, y[dup])
                t_temp = np.insert(t_temp, dup, t_temp[dup])
            cols["district"] += [name] * t_days.size
            cols["date"] += list(t_days)
            cols["demand_ml"] += list(y)
            cols["temp_c"] += list(t_temp)
            fit = 180 if i == 22 else 365
            entries.append(
                {
                    "id": f"demand-{name}",
                    "owner": owners[zone],
                    "tier": 1 if i % 9 == 1 else 2,
                    "description": f"Daily demand of supply district {name} ({zone} zone), megalitres per day",
                    "source": "demand",
                    "series": name,
                    "exogenous": ["temp_c"],
                    "spec": spec,
                    "noise": noise,
                    "fit": fit,
                    "audit": 56,
                    "last_validated": "2025-11-01",
                }
            )
            fits[f"demand-{name}"] = (days, y if i not in (13, 25, 31, 32) else None, {"temp_c": temp})
        table = pa.table(
            {
                "district": cols["district"],
                "date": pa.array(np.array(cols["date"], dtype="datetime64[D]")),
                "demand_ml": cols["demand_ml"],
                "temp_c": cols["temp_c"],
            }
        )
        pq.write_table(table, data / "demand" / f"zone={zone}.parquet")
    net = {"asset": [], "date": [], "reading": []}
    stations: dict[str, tuple] = {}
    for j in range(1, 7):
        y, spec, params = _station(j, n, rng)
        name = f"pump-{j:02d}"
        stations[name] = (y, spec, params)
        net["asset"] += [name] * n
        net["date"] += list(days)
        net["reading"] += list(y)
        entries.append(
            {
                "id": f"energy-{name}",
                "owner": "Network operations (K. Mbeki)",
                "tier": 3,
                "description": f"Daily pumping energy of station {name}, MWh",
                "source": "network",
                "series": name,
                "exogenous": [],
                "spec": spec,
                "noise": {"law": "normal"},
                "fit": 365,
                "audit": 56,
                "last_validated": "2025-11-01",
            }
        )
        fits[f"energy-{name}"] = (days, y, {})
    leaks = {}
    for k in (1, 2):
        y, spec = _leakage(n, rng)
        leaks[k] = y
        name = f"leak-{k:02d}"
        net["asset"] += [name] * n
        net["date"] += list(days)
        net["reading"] += list(y)
        entries.append(
            {
                "id": f"leakage-{name}",
                "owner": "Network operations (K. Mbeki)",
                "tier": 2,
                "description": f"Leakage index of network sector {k}",
                "source": "network",
                "series": name,
                "exogenous": [],
                "spec": spec,
                "noise": {"law": "normal"},
                "fit": 365,
                "audit": 56,
                "last_validated": "2025-11-01",
            }
        )
        fits[f"leakage-{name}"] = (days, y, {})
    pq.write_table(
        pa.table(
            {
                "asset": net["asset"],
                "date": pa.array(np.array(net["date"], dtype="datetime64[D]")),
                "reading": net["reading"],
            }
        ),
        data / "network.parquet",
    )
    legacy = {
        "id": "demand-d-40-legacy",
        "owner": "West zone forecasting (S. Iwu)",
        "tier": 3,
        "description": "Retired district kept in the registry by mistake",
        "source": "demand",
        "series": "d-40",
        "exogenous": ["temp_c"],
        "spec": dict(SEASONAL),
        "noise": {"law": "gaussian"},
        "fit": 365,
        "audit": 56,
        "last_validated": "2024-05-01",
    }
    supplier = _supplier(days, stations)
    pq.write_table(
        pa.table(
            {
                **supplier,
                "date": pa.array(np.array(supplier["date"], dtype="datetime64[D]")),
                "issued_at": pa.array(np.array(supplier["issued_at"], dtype="datetime64[s]")),
            }
        ),
        data / "supplier.parquet",
    )
    notebook = _notebook(days, leaks[1])
    pq.write_table(
        pa.table({**notebook, "date": pa.array(np.array(notebook["date"], dtype="datetime64[D]"))}),
        data / "notebook.parquet",
    )
    registry = out / "registry.yaml"
    registry.write_text(_registry_text(entries + [legacy]))
    archive = out / "archive"
    _production_versions(archive, entries, fits)
    return {"registry": str(registry), "archive": str(archive), "data": str(data)}


def _production_versions(archive: pathlib.Path, entries: list[dict], fits: dict) -> None:
    """Fit every model on data up to 31 October 2025 and promote the result (the 'old' production)."""
    end = np.datetime64(PRODUCTION_FIT_END.isoformat())
    for e in entries:
        days, y, exog = fits[e["id"]]
        if y is None:
            continue  # no production version: never validated (too short) or audited from refits only
        mask = days <= end
        sel = np.nonzero(mask)[0][-e["fit"] :]
        model = _model(e["spec"])
        fit = model.fit(y[sel], {k: v[sel] for k, v in exog.items()} or None)
        noise = {"law": e["noise"]["law"], "shape": float(e["noise"]["df"]) if "df" in e["noise"] else None}
        v = write_version(
            archive,
            e["id"],
            spec=model.to_dict(),
            noise=noise,
            params=fit.params,
            status="candidate",
            created_by="R. Okafor, forecasting lead (fictional)",
            lineage={"fit_last": str(PRODUCTION_FIT_END), "fit_window": e["fit"], "note": "demo setup"},
            note="initial fit for the demo",
            created_at="2025-11-01T09:00:00Z",
        )
        promote(
            archive,
            e["id"],
            v.version,
            approved_by="M. Achterberg, Head of Model Risk (fictional)",
            note="validated and approved for production (demo setup)",
        )
