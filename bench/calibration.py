"""Validation study: size and power of the audit protocol.

Size.  Series are simulated from correctly specified models and audited with
``fitaudit.core.audit.audit_series`` under each calibration mode; the empirical rejection rate at
nominal 5 % is reported for the distribution gate (``p_distribution <= 0.05``) and for the whole
check (``p_value <= 0.05``, the Bonferroni combination with the Ljung-Box gate), for the refit
check and for the production check (the true parameters serve as the production version).

Power.  Simulated calibration on series that break one assumption.  On the same residuals, the
audit's calibrated summary (the standardised maximum ``r_max`` of the divergence map, p-value
``p_distribution``) is compared with the single members Pearson (grid point alpha = 2, beta = 0)
and likelihood-ratio (alpha = 1, beta = 0), each rejecting when its statistic exceeds its own
simulated 95 % null point (``NullTable.reference`` of the very table the audit used), and with
scipy's Jarque-Bera test and Anderson-Darling test for normality (5 % level) on the residuals.
The same series are also audited with two smaller grids, and the power of every single grid
member is kept, to show what the maximum over the default grid costs.  A last table measures the
Ljung-Box gate alone on i.i.d. audit windows, which explains the production whole-check sizes.

Every series and every null table is seeded, so a run reproduces its numbers exactly whatever the
number of worker processes.

Usage::

    python bench/calibration.py [--quick] [--jobs N] [--out PATH]

The full run writes ``docs/validation.md``; ``--quick`` only prints unless ``--out`` is given.
"""

from __future__ import annotations

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # threaded BLAS only slows the many small fits

import argparse  # noqa: E402
import dataclasses  # noqa: E402
import hashlib  # noqa: E402
import importlib.metadata  # noqa: E402
import math  # noqa: E402
import pathlib  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
import zlib  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
import scipy  # noqa: E402
from scipy import stats  # noqa: E402

from fitaudit.core.audit import AuditSettings, as_noise_law, audit_series  # noqa: E402
from fitaudit.core.calibration import CalibrationCache, Gate, production_table, refit_table, standardised_maximum  # noqa: E402
from fitaudit.core.cells import make_partitions, number_of_cells  # noqa: E402
from fitaudit.core.diagnostics import ljung_box, ljung_box_lags  # noqa: E402
from fitaudit.core.models import Arima, ExpSmoothing  # noqa: E402

SEED = 20261204
LEVEL = 0.05
SIZE_GOAL = (0.04, 0.06)
REPO = pathlib.Path(__file__).resolve().parents[1]
DEFAULT_OUT = REPO / "docs" / "validation.md"
BASE = AuditSettings(locate_change=False)  # defaults: simulated, R = 999, grid 17 x 9, window 56
WINDOW = BASE.audit_window


# ---------------------------------------------------------------------------------------------
# What is simulated
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Plan:
    """How much is simulated (``quick`` for CI, otherwise the full study)."""

    series: int  # per setting, simulated and asymptotic calibration
    bootstrap_series: int  # per setting, bootstrap calibration
    bootstrap_replicates: int  # refits per bootstrap table
    power_series: int  # per power scenario
    table_seeds: int  # distinct simulated null tables per setting (series i uses seed i mod K)
    null_series: int  # exact-null audit windows for each production gate alone


QUICK = Plan(
    series=200, bootstrap_series=10, bootstrap_replicates=39, power_series=300, table_seeds=5, null_series=2000
)
FULL = Plan(
    series=4000, bootstrap_series=500, bootstrap_replicates=99, power_series=2000, table_seeds=25, null_series=20000
)


@dataclass(frozen=True)
class Scenario:
    """One simulation setting: the audited spec, how the data are made, which check is read.

    ``innovations`` is ``("normal",)``, ``("student-t", df)`` or ``("skew-normal", a)``, always
    rescaled to variance ``sigma2``; ``generator`` simulates the data when it differs from the
    audited ``spec``; ``shift`` (in innovation standard deviations) is added to the last
    ``WINDOW`` observations.
    """

    name: str
    spec: Any
    truth: dict
    n: int
    noise: Any = "normal"
    innovations: tuple = ("normal",)
    generator: Any = None
    generator_truth: dict | None = None
    shift: float = 0.0
    check: str = "refit"
    departure: str = "distribution"  # or "none" (a null row) or "dependence"
    stored: dict | None = None  # the production version audited, when it differs from the truth

    @property
    def production(self) -> dict:
        """The parameters the production check runs (the stored version, or the truth)."""
        return self.stored or self.truth


AR1 = Arima(order=(1, 0, 0), trend="c")
AR1_TRUTH = {"ar1": 0.6, "intercept": 10.0, "sigma2": 1.0}
HW_SEASON = (3.0, 1.0, -0.5, -1.0, -2.0, -1.5)

SIZE_SCENARIOS = (
    Scenario("AR(1), normal, n=200", AR1, AR1_TRUTH, 200),
    Scenario(
        "ARMA(1,1), student-t(5) fixed, n=500",
        Arima(order=(1, 0, 1), trend="c"),
        {"ar1": 0.5, "ma1": 0.3, "intercept": 2.0, "sigma2": 1.0},
        500,
        noise={"law": "student-t", "shape": 5},
        innovations=("student-t", 5.0),
    ),
    Scenario(
        "airline (0,1,1)(0,1,1)12, normal, n=144",
        Arima(order=(0, 1, 1), seasonal=(0, 1, 1, 12)),
        {"ma1": -0.4, "sma1": -0.6, "sigma2": 1.0},
        144,
    ),
    Scenario(
        "Holt-Winters ETS(A,A,A) m=7, normal, n=365",
        ExpSmoothing(trend="add", seasonal="add", period=7),
        {
            "alpha": 0.3,
            "beta": 0.02,
            "gamma": 0.1,
            "l0": 100.0,
            "b0": 0.05,
            **{f"s{k}": v for k, v in enumerate(HW_SEASON)},
            "sigma2": 1.0,
        },
        365,
    ),
)

POWER_SCENARIOS = (
    Scenario("no departure (refit check), AR(1) n=200", AR1, AR1_TRUTH, 200, departure="none"),
    Scenario("student-t(3) noise audited as normal, n=200", AR1, AR1_TRUTH, 200, innovations=("student-t", 3.0)),
    Scenario("skew-normal(a=3) noise audited as normal, n=200", AR1, AR1_TRUTH, 200, innovations=("skew-normal", 3.0)),
    Scenario("no departure (production check), AR(1) n=300", AR1, AR1_TRUTH, 300, check="production", departure="none"),
    Scenario(
        "contamination: 5 % of errors at +-4 sd, audited as normal, n=200",
        AR1,
        AR1_TRUTH,
        200,
        innovations=("contaminated", 0.05, 4.0),
    ),
    Scenario(
        "bimodal mixture (modes at +-0.8 sd), audited as normal, n=200",
        AR1,
        AR1_TRUTH,
        200,
        innovations=("bimodal", 0.8),
    ),
    Scenario(
        "level shift +1 sd over the last 56 (production check), n=300",
        AR1,
        AR1_TRUTH,
        300,
        shift=1.0,
        check="production",
    ),
    Scenario(
        "variance understated: stored sigma2 0.5, true 1 (production check), n=300",
        AR1,
        AR1_TRUTH,
        300,
        check="production",
        stored=dict(AR1_TRUTH, sigma2=0.5),
    ),
    Scenario(
        "variance overstated: stored sigma2 2, true 1 (production check), n=300",
        AR1,
        AR1_TRUTH,
        300,
        check="production",
        stored=dict(AR1_TRUTH, sigma2=2.0),
    ),
    Scenario(
        "neglected seasonality: SAR(1)_7 = 0.3 audited as AR(1), n=200",
        AR1,
        AR1_TRUTH,
        200,
        generator=Arima(order=(1, 0, 0), seasonal=(1, 0, 0, 7), trend="c"),
        generator_truth={"ar1": 0.6, "sar1": 0.3, "intercept": 10.0, "sigma2": 1.0},
        departure="dependence",
    ),
)

#: Smaller grids audited on the same power series (same statistic, fewer members).
REDUCED_GRIDS: tuple = ()  # superseded by CANDIDATES (scored on the same PIT values, no re-audit)


def innovations(kind: tuple, n: int, sigma2: float, rng: np.random.Generator) -> np.ndarray:
    """``n`` i.i.d. innovations of the given law, centred and scaled to variance ``sigma2``."""
    sd = math.sqrt(sigma2)
    if kind[0] == "normal":
        return sd * rng.standard_normal(n)
    if kind[0] == "student-t":
        df = kind[1]
        return sd * math.sqrt((df - 2.0) / df) * rng.standard_t(df, n)
    if kind[0] == "skew-normal":
        law = stats.skewnorm(kind[1])
        mean, var = law.stats(moments="mv")
        return sd * (law.rvs(size=n, random_state=rng) - mean) / math.sqrt(var)
    if kind[0] == "contaminated":
        # a share of the errors replaced by +-k sd (random sign), rescaled to unit variance
        share, k = kind[1], kind[2]
        x = rng.standard_normal(n)
        hit = rng.random(n) < share
        x[hit] = k * np.where(rng.random(int(hit.sum())) < 0.5, -1.0, 1.0)
        return sd * x / math.sqrt(1.0 - share + share * k * k)
    if kind[0] == "bimodal":
        # equal mixture of N(-d, 1 - d^2) and N(d, 1 - d^2): unit variance, modes near +-d
        d = kind[1]
        sign = np.where(rng.random(n) < 0.5, -1.0, 1.0)
        return sd * (sign * d + math.sqrt(1.0 - d * d) * rng.standard_normal(n))
    raise ValueError(f"unknown innovation law {kind!r}; use normal, student-t, skew-normal, contaminated or bimodal")


def simulate(scenario: Scenario, index: int) -> np.ndarray:
    """Series ``index`` of a scenario (seeded by the study seed, the scenario name and the index)."""
    rng = np.random.default_rng([SEED, zlib.crc32(scenario.name.encode()), index])
    model = scenario.generator or scenario.spec
    truth = scenario.generator_truth or scenario.truth
    y = model.simulate(
        truth, scenario.n, rng, innovations=innovations(scenario.innovations, scenario.n, truth["sigma2"], rng)
    )
    if scenario.shift:
        y[-WINDOW:] += scenario.shift * math.sqrt(truth["sigma2"])
    return y


# ---------------------------------------------------------------------------------------------
# One chunk of series (all sharing one table seed), run in a worker
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Job:
    study: str  # "size" or "power"
    scenario: Scenario
    settings: AuditSettings
    indices: tuple


def _audit(scenario: Scenario, y: np.ndarray, settings: AuditSettings, cache: CalibrationCache, production: bool):
    """``audit_series`` on one series, with the true parameters as production version if asked."""
    return audit_series(
        y,
        scenario.spec,
        noise=scenario.noise,
        production=scenario.production if production else None,
        settings=settings,
        cache=cache,
    )


def _size_record(res) -> dict:
    """Rejections at nominal 5 % of one audit: distribution gate, whole check, and the Ljung-Box
    gate at its Bonferroni share (``LEVEL / 2``), per check; the message of a check that failed."""
    rec = {}
    for kind, check in (("refit", res.refit), ("production", res.production)):
        rec[f"{kind}_ok"] = check.ok
        rec[f"{kind}_gate"] = check.ok and check.p_distribution <= LEVEL
        rec[f"{kind}_independence"] = check.ok and check.p_independence <= LEVEL / 2
        rec[f"{kind}_check"] = check.ok and check.p_value <= LEVEL
        rec[f"{kind}_message"] = check.message
    return rec


def _null_table(scenario: Scenario, check, settings: AuditSettings, cache: CalibrationCache):
    """The null table the audit used for ``check`` (a cache hit: same key, same table)."""
    grid = (settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed)
    if check.kind == "production":
        return production_table(check.n, check.cells, *grid, cache=cache)
    law = as_noise_law(scenario.noise)
    return refit_table(law, check.n, check.cells, scenario.spec.has_location(), *grid, shape=law.shape, cache=cache)


def _residuals(scenario: Scenario, y: np.ndarray, res) -> np.ndarray:
    """The residuals the check scored: refit innovations, or the production errors of the window."""
    if scenario.check == "production":
        return scenario.spec.production_errors(y, scenario.production)[-WINDOW:]
    e = scenario.spec.errors(y, res.fitted["params"])
    return e[~np.isnan(e)]


#: Candidate distribution gates (partitions x members) compared on every power series; the
#: default of ``AuditSettings`` must be the one with the highest mean power over the
#: distributional alternatives that is never below Pearson on the equiprobable cells.
CLASSICAL3 = ((1.0, 0.0), (5.0 / 3.0, 0.0), (2.0, 0.0))
BETA0_ROW = tuple((float(a), 0.0) for a in BASE.alphas)
FULL_GRID = None  # every (alpha, beta) of the grid
CANDIDATES = (
    ("equiprobable x full grid (before this change)", ("equiprobable",), FULL_GRID),
    ("equiprobable x G2, CR 2/3, X2", ("equiprobable",), CLASSICAL3),
    ("terciles + equiprobable + tails x G2, CR 2/3, X2", ("terciles", "equiprobable", "tails"), CLASSICAL3),
    ("quartiles + equiprobable + tails x G2, CR 2/3, X2", ("quartiles", "equiprobable", "tails"), CLASSICAL3),
    ("quartiles + tails x G2, CR 2/3, X2", ("quartiles", "tails"), CLASSICAL3),
    ("terciles + equiprobable + tails x beta = 0 row", ("terciles", "equiprobable", "tails"), BETA0_ROW),
    ("terciles + equiprobable + tails x full grid", ("terciles", "equiprobable", "tails"), FULL_GRID),
    ("tails x G2, CR 2/3, X2", ("tails",), CLASSICAL3),
)


def _candidate_gate(partitions: tuple, members, n: int, k: int) -> Gate:
    if members is None:
        members = tuple((a, b) for a in BASE.alphas for b in BASE.betas)
    alphas, betas = zip(*members)
    return Gate(make_partitions(partitions, n, k), alphas, betas, BASE.scaling, BASE.r)


def _pit(scenario: Scenario, e: np.ndarray) -> tuple[np.ndarray, int, bool]:
    """PIT values of the scored residuals as the audit computes them, with k and the location flag."""
    law = as_noise_law(scenario.noise)
    if scenario.check == "production":
        return law.cdf(e, law.from_variance(scenario.production["sigma2"])), 0, False
    location = scenario.spec.has_location()
    return law.cdf(e, law.fit(e, location=location)), law.n_estimated(location), location


def _candidate_rejections(
    scenario: Scenario, e: np.ndarray, settings: AuditSettings, cache: CalibrationCache
) -> list[bool]:
    """Distribution-gate decision (p <= LEVEL) of every candidate gate on the same PIT values."""
    u, k, location = _pit(scenario, e)
    n = u.size
    s = number_of_cells(n, k)
    law = as_noise_law(scenario.noise)
    out = []
    for _, partitions, members in CANDIDATES:
        gate = _candidate_gate(partitions, members, n, k)
        grid = (settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed)
        if scenario.check == "production":
            table = production_table(n, s, *grid, cache=cache, gate=gate)
        else:
            table = refit_table(law, n, s, location, *grid, shape=law.shape, cache=cache, gate=gate)
        r = float(standardised_maximum(gate.statistics(u), table.gate_reference))
        out.append(table.gate_p_value(r) <= LEVEL)
    return out


def _anderson_darling_given(u: np.ndarray) -> float:
    """Anderson-Darling A2 of PIT values under a fully specified law (Anderson and Darling 1954):
    ``A2 = -n - (1/n) sum_i (2i - 1) [log u_(i) + log(1 - u_(n+1-i))]``."""
    x = np.clip(np.sort(u), 1e-300, 1 - 1e-16)
    n = x.size
    i = np.arange(1, n + 1)
    return float(-n - np.mean((2 * i - 1) * (np.log(x) + np.log1p(-x[::-1]))))


#: 95 % point of A2 for a fully specified law and n = WINDOW, by simulation of uniform samples
#: (Stephens 1974 tabulates 2.492 for this case, n >= 5, from memory).
AD_GIVEN_CRITICAL = float(
    np.quantile([_anderson_darling_given(u) for u in np.random.default_rng([SEED, 1954]).random((20000, WINDOW))], 0.95)
)


def _power_record(scenario: Scenario, y: np.ndarray, settings: AuditSettings, cache: CalibrationCache) -> dict:
    in_production = scenario.check == "production"
    res = _audit(scenario, y, settings, cache, production=in_production)
    check = getattr(res, scenario.check)
    if not check.ok:
        return {"ok": False}
    table = _null_table(scenario, check, settings, cache)
    t = check.map.statistic
    ib = settings.betas.index(0.0)
    cells = {name: (settings.alphas.index(alpha), ib) for name, alpha in (("pearson", 2.0), ("likelihood-ratio", 1.0))}
    for name, cell in cells.items():
        if not math.isclose(t[cell], check.members[name]["statistic"], rel_tol=1e-9, abs_tol=1e-9):
            raise AssertionError(f"grid point {cell} is not the {name} statistic; the comparison would be wrong")
    with np.errstate(invalid="ignore"):
        members = np.isfinite(table.reference) & np.isfinite(t) & (t > table.reference)
    e = _residuals(scenario, y, res)
    rec = {
        "ok": True,
        "ours": check.p_distribution <= LEVEL,
        "pearson": bool(members[cells["pearson"]]),
        "likelihood-ratio": bool(members[cells["likelihood-ratio"]]),
        "jarque-bera": stats.jarque_bera(e).pvalue <= LEVEL,
        "anderson-darling": stats.anderson(e, dist="norm", method="interpolate").pvalue <= LEVEL,
        "anderson-darling (given)": (_anderson_darling_given(_pit(scenario, e)[0]) > AD_GIVEN_CRITICAL)
        if in_production
        else None,
        "candidates": _candidate_rejections(scenario, e, settings, cache),
        "independence": check.p_independence <= LEVEL,
        "whole check": check.p_value <= LEVEL,
        "grid": members,
        "calibrated": np.isfinite(table.reference),
        "critical": table.critical_value(LEVEL),
    }
    for label, alphas, betas in REDUCED_GRIDS:
        small = dataclasses.replace(settings, alphas=alphas, betas=betas)
        rec[label] = getattr(_audit(scenario, y, small, cache, in_production), scenario.check).p_distribution <= LEVEL
    return rec


def run_job(job: Job) -> list[tuple[int, dict]]:
    """Audit the job's series; one record per series index."""
    cache = CalibrationCache()
    out = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # failed fits are counted through the check status
        for i in job.indices:
            y = simulate(job.scenario, i)
            if job.study == "size":
                out.append((i, _size_record(_audit(job.scenario, y, job.settings, cache, production=True))))
            else:
                out.append((i, _power_record(job.scenario, y, job.settings, cache)))
    return out


def _jobs(study: str, scenario: Scenario, settings: AuditSettings, series: int, table_seeds: int) -> list[Job]:
    """Series 0..series-1 split by table seed (series i uses seed i mod table_seeds)."""
    return [
        Job(study, scenario, dataclasses.replace(settings, seed=k), tuple(range(k, series, table_seeds)))
        for k in range(min(table_seeds, series))
    ]


def run_all(groups: dict[tuple, list[Job]], workers: int) -> dict[tuple, list[dict]]:
    """Run every job (in ``workers`` processes); records per group, ordered by series index."""
    flat = [(key, job) for key, jobs in groups.items() for job in jobs]
    if workers > 1:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            results = list(pool.map(run_job, [job for _, job in flat]))
    else:
        results = [run_job(job) for _, job in flat]
    merged: dict[tuple, list] = {key: [] for key in groups}
    for (key, _), records in zip(flat, results):
        merged[key].extend(records)
    return {key: [rec for _, rec in sorted(recs, key=lambda r: r[0])] for key, recs in merged.items()}


# ---------------------------------------------------------------------------------------------
# Rates and standard errors
# ---------------------------------------------------------------------------------------------
def rate(records: list[dict], field: str, ok: str = "ok", tables: int = 0, replicates: int = 0) -> dict:
    """Rejection rate over the checks that ran, with its Monte Carlo standard error.

    The standard error is binomial, ``sqrt(p (1 - p) / N)``; with ``tables`` shared simulated
    tables of ``replicates`` draws it adds the between-table variance of a Monte Carlo test's
    conditional size, ``a (1 - a) / ((R + 2) K)`` at ``a = 0.05`` (the conditional size of the
    rule ``p <= a`` given one table is Beta-distributed with that variance).
    """
    used = [r for r in records if r.get(ok)]
    n = len(used)
    p = float(np.mean([bool(r[field]) for r in used])) if n else float("nan")
    var = p * (1.0 - p) / n if n else float("nan")
    if tables:
        var += LEVEL * (1.0 - LEVEL) / ((replicates + 2) * tables)
    return {"rate": p, "se": math.sqrt(var), "n": n, "failed": len(records) - n}


def fmt(r: dict) -> str:
    return f"{r['rate']:.3f} ± {r['se']:.3f}"


# ---------------------------------------------------------------------------------------------
# The two studies
# ---------------------------------------------------------------------------------------------
CALIBRATIONS = ("simulated", "asymptotic", "bootstrap")
SIZE_FIELDS = ("refit_gate", "refit_check", "production_gate", "production_check")
INDEPENDENCE_FIELDS = ("refit_independence", "production_independence")
STATISTICS = ("ours", "pearson", "likelihood-ratio", "jarque-bera", "anderson-darling")


def size_groups(plan: Plan) -> dict[tuple, list[Job]]:
    groups = {}
    for sc in SIZE_SCENARIOS:
        for cal in CALIBRATIONS:
            settings = dataclasses.replace(BASE, calibration=cal, bootstrap_replicates=plan.bootstrap_replicates)
            series = plan.bootstrap_series if cal == "bootstrap" else plan.series
            groups[("size", sc.name, cal)] = _jobs("size", sc, settings, series, plan.table_seeds)
    return groups


def power_groups(plan: Plan) -> dict[tuple, list[Job]]:
    return {
        ("power", sc.name, "simulated"): _jobs("power", sc, BASE, plan.power_series, plan.table_seeds)
        for sc in POWER_SCENARIOS
    }


def size_table(records: dict, plan: Plan) -> list[dict]:
    rows = []
    for sc in SIZE_SCENARIOS:
        for cal in CALIBRATIONS:
            recs = records[("size", sc.name, cal)]
            tables = plan.table_seeds if cal == "simulated" else 0
            row = {"setting": sc.name, "calibration": cal, "series": len(recs)}
            for f in SIZE_FIELDS + INDEPENDENCE_FIELDS:
                kind = f.split("_")[0]
                row[f] = rate(
                    recs, f, ok=f"{kind}_ok", tables=tables if f in SIZE_FIELDS else 0, replicates=BASE.replicates
                )
                row[f"{kind}_messages"] = sorted({r[f"{kind}_message"] for r in recs if not r[f"{kind}_ok"]})
            rows.append(row)
    return rows


def power_table(records: dict) -> tuple[list[dict], dict]:
    rows = []
    for sc in POWER_SCENARIOS:
        recs = records[("power", sc.name, "simulated")]
        row = {
            "scenario": sc.name,
            "departure": sc.departure,
            "check": sc.check,
            "scored": WINDOW if sc.check == "production" else sc.n,
        }
        for f in STATISTICS + tuple(label for label, _, _ in REDUCED_GRIDS) + ("independence", "whole check"):
            row[f] = rate(recs, f)
        used = [r for r in recs if r["ok"]]
        row["grid"] = np.mean([r["grid"] for r in used], axis=0)
        calibrated = np.all([r["calibrated"] for r in used], axis=0)
        row["grid_range"] = (
            float(row["grid"][calibrated].min()),
            float(row["grid"][calibrated].max()),
            int(calibrated.sum()),
        )
        row["critical"] = float(np.mean([r["critical"] for r in used]))
        if sc.check == "production":
            row["anderson-darling (given)"] = rate(recs, "anderson-darling (given)")
        cand = np.array([r["candidates"] for r in used], dtype=float)
        row["candidates"] = [
            {"rate": float(c.mean()), "se": math.sqrt(c.mean() * (1 - c.mean()) / c.size)} for c in cand.T
        ]
        rows.append(row)
    alternatives = [r for r in rows if r["departure"] == "distribution"]
    means = {}
    for f in STATISTICS + tuple(label for label, _, _ in REDUCED_GRIDS):
        vals = [r[f] for r in alternatives]
        means[f] = {
            "rate": float(np.mean([v["rate"] for v in vals])),
            "se": math.sqrt(sum(v["se"] ** 2 for v in vals)) / len(vals),
        }
    cand_means = [float(np.mean([r["candidates"][i]["rate"] for r in alternatives])) for i in range(len(CANDIDATES))]
    eligible = [
        i
        for i in range(len(CANDIDATES))
        if all(r["candidates"][i]["rate"] >= r["pearson"]["rate"] for r in alternatives)
    ]
    chosen = max(eligible or range(len(CANDIDATES)), key=lambda i: cand_means[i])
    default = next(
        (
            i
            for i, (_, parts, members) in enumerate(CANDIDATES)
            if tuple(parts) == BASE.partitions and members == BASE.gate_members
        ),
        None,
    )
    means["candidates"] = {"means": cand_means, "eligible": eligible, "chosen": chosen, "default": default}
    grid_mean = np.mean([r["grid"] for r in alternatives], axis=0)
    ia, ib = np.unravel_index(int(np.argmax(grid_mean)), grid_mean.shape)
    means["best grid member"] = {"rate": float(grid_mean[ia, ib]), "alpha": BASE.alphas[ia], "beta": BASE.betas[ib]}
    return rows, means


def goals(size_rows: list[dict], power_rows: list[dict], means: dict) -> dict:
    lo, hi = SIZE_GOAL
    size = []
    for row in size_rows:
        if row["calibration"] != "simulated":
            continue
        for f in SIZE_FIELDS:
            r = row[f]["rate"]
            size.append({"setting": row["setting"], "rate": f, "value": r, "met": lo <= r <= hi})
    alternatives = [r for r in power_rows if r["departure"] == "distribution"]
    best_peer = max(("anderson-darling", "jarque-bera"), key=lambda f: means[f]["rate"])
    below_pearson = [
        {"scenario": r["scenario"], "ours": r["ours"]["rate"], "pearson": r["pearson"]["rate"]}
        for r in alternatives
        if r["ours"]["rate"] < r["pearson"]["rate"]
    ]
    cand = means["candidates"]
    return {
        "size": size,
        "size_met": all(s["met"] for s in size),
        "best_peer": best_peer,
        "mean_vs_peer": means["ours"]["rate"] - means[best_peer]["rate"],
        "mean_vs_pearson": means["ours"]["rate"] - means["pearson"]["rate"],
        "below_pearson": below_pearson,
        "power_met": means["ours"]["rate"] >= means[best_peer]["rate"] and not below_pearson,
        "default_is_choice": cand["default"] is not None and cand["default"] == cand["chosen"],
    }


def production_gates_null(plan: Plan) -> dict:
    """Each gate of the production check alone on its exact null, audit windows of ``WINDOW`` values.

    Distribution gate: i.i.d. uniform PIT values (multinomial cell counts) against each of the
    ``table_seeds`` production tables, rejecting as the audit does (``#{R* >= r} + 1 <= 0.05 (R + 1)``)
    and, for comparison, with ties counted against rejection only when strictly larger
    (``#{R* > r}``): the gap between the two is the conservativeness due to the discrete counts.
    Independence gate: Ljung-Box on i.i.d. normal errors with each lag the size study's production
    checks use (docs/method.md §9.2, no ARMA degrees of freedom), at ``LEVEL / 2`` and ``LEVEL``.
    """
    rng = np.random.default_rng([SEED, zlib.crc32(b"production nulls")])
    s = number_of_cells(WINDOW, 0)
    per_table = plan.null_series // plan.table_seeds
    with_ties, strict = [], []
    gate = BASE.gate(WINDOW, 0)
    for seed in range(plan.table_seeds):
        table = production_table(
            WINDOW, s, BASE.alphas, BASE.betas, BASE.scaling, BASE.r, BASE.replicates, seed, gate=gate
        )
        u = rng.random((per_table, WINDOW))
        r_obs = standardised_maximum(gate.statistics(u), table.gate_reference)
        with_ties += [table.gate_p_value(r) <= LEVEL for r in r_obs]
        exceed = table.gate_max.size - np.searchsorted(table.gate_max, r_obs, side="right")
        strict += list((1 + exceed) / (table.gate_max.size + 1) <= LEVEL)
    spread = table.reference / stats.chi2.ppf(1 - LEVEL, s - 1)  # the last table; members' own 95 % points
    ia, ib = np.unravel_index(int(np.nanargmax(np.where(np.isfinite(spread), spread, np.nan))), spread.shape)
    gate = {
        "cells": s,
        "reference_spread": (float(np.nanmin(spread)), float(spread[ia, ib]), BASE.alphas[ia], BASE.betas[ib]),
        "ties": rate(
            [{"ok": True, "x": v} for v in with_ties], "x", tables=plan.table_seeds, replicates=BASE.replicates
        ),
        "strict": rate(
            [{"ok": True, "x": v} for v in strict], "x", tables=plan.table_seeds, replicates=BASE.replicates
        ),
    }
    ljung = []
    for lags in sorted({ljung_box_lags(WINDOW, sc.spec.seasonal_period(), 0) for sc in SIZE_SCENARIOS}):
        p = np.array([ljung_box(rng.standard_normal(WINDOW), lags).p_value for _ in range(plan.null_series)])
        ljung.append(
            {
                "lags": lags,
                "half": rate([{"ok": True, "x": v <= LEVEL / 2} for v in p], "x"),
                "full": rate([{"ok": True, "x": v <= LEVEL} for v in p], "x"),
            }
        )
    return {"distribution": gate, "ljung_box": ljung}


# ---------------------------------------------------------------------------------------------
# Report
# ---------------------------------------------------------------------------------------------
def md_table(header: list[str], rows: list[list[str]]) -> str:
    lines = ["| " + " | ".join(header) + " |", "|" + "|".join("---" for _ in header) + "|"]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    return "\n".join(lines)


def _core_digest() -> str:
    """First 12 hex digits of the SHA-256 of every ``core/**/*.py`` (path and bytes): the code audited."""
    h = hashlib.sha256()
    for path in sorted((REPO / "core").rglob("*.py")):
        h.update(str(path.relative_to(REPO)).encode())
        h.update(path.read_bytes())
    return h.hexdigest()[:12]


def _versions() -> dict:
    """Interpreter, library and code versions, read when the run starts."""
    try:
        commit = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=REPO, capture_output=True, text=True, check=True
        ).stdout.strip()
        dirty = subprocess.run(
            ["git", "status", "--porcelain", "--", "core"], cwd=REPO, capture_output=True, text=True, check=True
        ).stdout.strip()
        commit += " (core/ has uncommitted changes)" if dirty else ""
    except (OSError, subprocess.CalledProcessError):
        commit = "unknown"
    return {
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "fitaudit": importlib.metadata.version("fitaudit"),
        "commit": commit,
        "core": _core_digest(),
        "cpus": os.cpu_count(),
    }


def _short(scenario: str) -> str:
    """A column label: the scenario's name up to its first comma or colon."""
    cut = min((i for i in (scenario.find(","), scenario.find(":")) if i > 0), default=len(scenario))
    return scenario[:cut]


def render(result: dict) -> str:
    """The markdown of docs/validation.md."""
    plan, g, means = result["plan"], result["goals"], result["means"]
    v = result["versions"]
    size_rows, power_rows = result["size"], result["power"]
    out = [
        "# Validation study: size and power of the audit",
        "",
        "Written by `bench/calibration.py`; do not edit by hand.",
        "",
        "## What was run",
        "",
        f"- Command: `{result['command']}`"
        + (" (the CI-sized quick mode: too few series for firm conclusions)" if result["quick"] else ""),
        f"- Seed {SEED} (series); null tables seeded by the audit's own rule, with table seeds "
        f"0..{plan.table_seeds - 1} (series i uses `AuditSettings(seed=i mod {plan.table_seeds})`).",
        f"- Versions: Python {v['python']}, numpy {v['numpy']}, scipy {v['scipy']}, fitaudit {v['fitaudit']}, commit "
        f"{v['commit']}, core/ source digest {v['core']} (SHA-256 of core/**/*.py); "
        f"{v['cpus']} CPUs, {result['workers']} worker process(es).",
        f"- Runtime: size study {result['seconds']['size']:.0f} s, power study {result['seconds']['power']:.0f} s, "
        f"total {result['seconds']['total']:.0f} s.",
        f"- Audit settings: the defaults (`AuditSettings()`): distribution gate = standardised maximum of the members "
        f"{', '.join(f'({a:.4g}, {b:g})' for a, b in BASE.gate_members)} (alpha, beta) on the partitions "
        f"{', '.join(BASE.partitions)}; the report's map = grid alpha -1..3 step 0.25 x beta 0..1 step 0.125 (153 "
        f"members) on the equiprobable cells; geometric scaling, R = {BASE.replicates} simulated null data sets per "
        f"table, audit window {WINDOW}, Ljung-Box lags by docs/method.md §9.2; change location off (it does not affect "
        "the p-values).",
        f"- Series: {plan.series} per setting for `simulated` and `asymptotic` (the same series for both); "
        f"`bootstrap`: the first {plan.bootstrap_series} of them, each with {plan.bootstrap_replicates} bootstrap "
        f"refits (`bootstrap_replicates={plan.bootstrap_replicates}`); power: {plan.power_series} series per scenario.",
        "- The calibrated summary is the audit's standardised maximum `r_max` = max over the gate's (partition, "
        "member) pairs of T / c, c the pair's own simulated 95 % null point (`NullTable.gate_reference`); its gate "
        "p-value is `p_distribution`. Every partition scores the same PIT values, and each null table scores the same "
        "simulated samples on every partition, so the maximum is calibrated jointly.",
        "",
        "Monte Carlo standard errors are given after ±. They are binomial; for `simulated` rows they also include the "
        f"spread between the {plan.table_seeds} null tables, 0.05·0.95/((R+2)K). Rates count the checks that ran; "
        "checks that could not run (a non-converged refit, say) are listed as failures.",
        "",
        "## 1. Size under correctly specified models (nominal 5 %)",
        "",
        "Models (true parameters, used as the production version): AR(1) ar1 0.6, intercept 10, sigma2 1; ARMA(1,1) "
        "ar1 0.5, ma1 0.3, intercept 2, sigma2 1, student-t(5) innovations audited with the student-t law at shape 5; "
        "airline ARIMA(0,1,1)(0,1,1)12 ma1 -0.4, sma1 -0.6, sigma2 1, no intercept; Holt-Winters ETS(A,A,A) m = 7, "
        f"alpha 0.3, beta 0.02, gamma 0.1, l0 100, b0 0.05, seasonal states {list(HW_SEASON)}, sigma2 1. "
        "Gate = distribution gate (`p_distribution <= 0.05`); check = whole check (`p_value <= 0.05`, Bonferroni with "
        f"Ljung-Box). The production check scores the last {WINDOW} one-step errors of the true parameters "
        "(Holt-Winters re-estimates its initial states on the series, its documented production rule).",
        "",
    ]
    header = [
        "setting",
        "calibration",
        "series",
        "refit gate",
        "refit LB gate",
        "refit check",
        "production gate",
        "production LB gate",
        "production check",
        "failed (refit / production)",
    ]
    rows = []
    for r in size_rows:
        cells = [
            r[f]
            for f in (
                "refit_gate",
                "refit_independence",
                "refit_check",
                "production_gate",
                "production_independence",
                "production_check",
            )
        ]
        failed = f"{r['refit_gate']['failed']} / {r['production_gate']['failed']}"
        rows.append([r["setting"], r["calibration"], str(r["series"])] + [fmt(c) for c in cells] + [failed])
    out += [md_table(header, rows), ""]
    messages = sorted(
        {(r["setting"], m) for r in size_rows for kind in ("refit", "production") for m in r[f"{kind}_messages"]}
    )
    out += [f'Checks that could not run, {setting}: "{message}"' for setting, message in messages]
    nulls = result["production_nulls"]
    out += [
        "",
        f"LB gate = the Ljung-Box gate alone at its Bonferroni share (`p_independence <= {LEVEL / 2:g}`). The "
        "production check has no model refit, so its `bootstrap` calibration uses the exact table of `simulated` "
        "(i.i.d. uniform PIT values); its bootstrap columns repeat the simulated rule on the first series.",
        "",
        f"The production check's gates alone on their exact null ({plan.null_series} audit windows of {WINDOW} values; "
        "distribution gate: i.i.d. uniform PIT values scored on the gate's partitions against the "
        f"{plan.table_seeds} production tables; independence gate: i.i.d. normal errors, chi-square(h) reference as in "
        "the asymptotic calibration, h by docs/method.md §9.2):",
        "",
        md_table(
            ["gate", f"rejection at {LEVEL / 2:g}", f"rejection at {LEVEL:g}"],
            [
                [
                    "distribution gate, as the audit rejects (ties count as exceedances)",
                    "",
                    fmt(nulls["distribution"]["ties"]),
                ],
                [
                    "distribution gate, ties not counted (strictly larger only)",
                    "",
                    fmt(nulls["distribution"]["strict"]),
                ],
            ]
            + [[f"Ljung-Box, h = {r['lags']}", fmt(r["half"]), fmt(r["full"])] for r in nulls["ljung_box"]],
        ),
        "",
        "## 2. Power (simulated calibration)",
        "",
        "AR(1) ar1 0.6, intercept 10, innovation variance 1, audited as AR(1) with intercept and normal noise. "
        "Columns: ours = the audit's distribution gate (`p_distribution <= 0.05`); Pearson and likelihood-ratio = "
        "the members (alpha 2, beta 0) and (alpha 1, beta 0) of the map on the equiprobable cells (the gate before "
        "this change used those cells only; with beta 0 the geometric scaling is m = q, so these are exactly X2 and "
        "G2, checked against `members`), each rejecting when it exceeds its own simulated 95 % null point; "
        "Jarque-Bera = `scipy.stats.jarque_bera(e).pvalue <= 0.05`; Anderson-Darling = `scipy.stats.anderson(e, "
        "'norm', method='interpolate').pvalue <= 0.05` (location and scale estimated from e); AD given = "
        "Anderson-Darling with the production parameters as given (no estimation), the fair peer for the production "
        f"check, against its simulated 95 % point for n = {WINDOW} ({AD_GIVEN_CRITICAL:.3f}; Stephens 1974 tabulates "
        "2.492 for this case, from memory); e = the residuals the check scored (refit innovations, or the production "
        "errors of the audit window). Skew-normal(a = 3) has skewness "
        f"{float(stats.skewnorm(3.0).stats(moments='s')):.2f}; the contamination replaces 5 % of the innovations by "
        "+-4 sd (then rescaled to unit variance); the bimodal law is an equal mixture of N(-0.8, 0.36) and N(0.8, "
        f"0.36); the level shift is +1 innovation sd on the last {WINDOW} of 300 values (the one-step errors of the "
        f"true parameters shift by {1 - AR1_TRUTH['ar1']:g} sd after the first); the variance rows audit the true "
        "AR(1) with a stored sigma2 of 0.5 or 2.",
        "",
    ]
    header = [
        "scenario",
        "check",
        "ours",
        "Pearson",
        "likelihood-ratio",
        "Jarque-Bera",
        "Anderson-Darling",
        "AD given",
        "independence gate",
        "whole check",
    ]
    rows = [
        [r["scenario"], r["check"]]
        + [fmt(r[f]) for f in STATISTICS]
        + [fmt(r["anderson-darling (given)"]) if "anderson-darling (given)" in r else ""]
        + [fmt(r[f]) for f in ("independence", "whole check")]
        for r in power_rows
    ]
    rows.append(
        ["**mean over the distributional alternatives**", ""]
        + [f"**{means[f]['rate']:.3f}** ± {means[f]['se']:.3f}" for f in STATISTICS]
        + ["", "", ""]
    )
    out += [md_table(header, rows), ""]
    n_alt = sum(r["departure"] == "distribution" for r in power_rows)
    out += [
        f"The mean is over the {n_alt} distributional alternatives; the neglected seasonality is a dependence "
        "alternative, for the independence gate, and no cell-count statistic can see it (they are invariant to the "
        "order of the residuals).",
        "",
        "### Which gate: the candidates on the same series",
        "",
        "Every candidate gate scores the PIT values of the very residuals the audit scored, each against its own "
        "simulated table (same table seeds). The default must be the candidate with the highest mean power over the "
        "distributional alternatives among those never below Pearson on the equiprobable cells in any alternative.",
        "",
    ]
    alt_rows = [r for r in power_rows if r["departure"] != "dependence"]
    cand = means["candidates"]
    header = (
        ["candidate gate"]
        + [_short(r["scenario"]) for r in alt_rows]
        + ["mean over alternatives", "never below Pearson"]
    )
    rows = []
    for i, (label, _, _) in enumerate(CANDIDATES):
        tag = (" **(default)**" if i == cand["default"] else "") + (
            " *(study's choice)*" if i == cand["chosen"] else ""
        )
        rows.append(
            [label + tag]
            + [f"{r['candidates'][i]['rate']:.3f}" for r in alt_rows]
            + [f"{cand['means'][i]:.3f}", "yes" if i in cand["eligible"] else "no"]
        )
    rows.append(
        ["Pearson, equiprobable cells (single member)"]
        + [f"{r['pearson']['rate']:.3f}" for r in alt_rows]
        + [f"{means['pearson']['rate']:.3f}", ""]
    )
    out += [md_table(header, rows), ""]
    best = means["best grid member"]
    out += [
        "Single members of the map on the equiprobable cells, each against its own 95 % point, chosen after seeing "
        f"the results (an optimistic bound, not a usable test): the best is alpha {best['alpha']:g}, beta "
        f"{best['beta']:g}, mean power {best['rate']:.3f}.",
        "",
    ]

    lo, hi = SIZE_GOAL
    out += ["## 3. Goals", ""]
    if result["quick"]:
        out += [
            "Quick mode: with a few hundred series the standard errors (about 0.015 at 5 %) are too large for these "
            "verdicts to mean much; the full run decides.",
            "",
        ]
    missed = "; ".join(
        f"{s['setting']}, {s['rate'].replace('_', ' ')} = {s['value']:.3f}" for s in g["size"] if not s["met"]
    )
    out.append(
        f"- `simulated` size within [{lo}, {hi}] in every setting (gate and whole check, refit and production): "
        + (f"**missed** in {missed}." if missed else "**met** in all cells.")
    )
    out.append(
        f"- Mean power over the distributional alternatives at least the better of Anderson-Darling and Jarque-Bera "
        f"({g['best_peer']}, {means[g['best_peer']]['rate']:.3f}): "
        + ("**met**" if g["mean_vs_peer"] >= 0 else f"**missed** by {-g['mean_vs_peer']:.3f}")
        + f" (ours {means['ours']['rate']:.3f})."
    )
    below = "; ".join(f"{b['scenario']} ({b['ours']:.3f} against {b['pearson']:.3f})" for b in g["below_pearson"])
    out.append(
        "- Never below Pearson on the equiprobable cells in any alternative: "
        + (f"**missed** in {below}." if below else "**met**.")
    )
    cand = means["candidates"]
    out.append(
        "- The default gate is the study's choice: "
        + (
            "**met**"
            if g["default_is_choice"]
            else f"**missed**: the study chose {CANDIDATES[cand['chosen']][0]!r}; change `DEFAULT_PARTITIONS` / "
            "`DEFAULT_GATE_MEMBERS` in core/settings.py and rerun"
        )
        + "."
    )
    out += ["", "## 4. Discussion", ""]
    out += discussion(result)
    forecast = [line.replace("## Forecast audits", "## 5. Forecast audits", 1) for line in result.get("forecast") or []]
    if forecast:
        out += [""] + forecast
    return "\n".join(out) + "\n"


def _forecast_study():
    """bench/forecast_study.py, as a sibling script or as part of the bench package."""
    try:
        import forecast_study  # run as `python bench/calibration.py`
    except ImportError:
        from bench import forecast_study
    return forecast_study


def discussion(result: dict) -> list[str]:
    """Plain statements read off the measured numbers."""
    size_rows, power_rows, means, g = result["size"], result["power"], result["means"], result["goals"]
    lines = []
    by = {(r["setting"], r["calibration"]): r for r in size_rows}
    asym = [(s.name, by[(s.name, "asymptotic")]) for s in SIZE_SCENARIOS]
    prod = ", ".join(f"{r['production_gate']['rate']:.3f}" for _, r in asym)
    refit = ", ".join(f"{r['refit_gate']['rate']:.3f}" for _, r in asym)
    liberal = all(r[f]["rate"] > SIZE_GOAL[1] for _, r in asym for f in ("refit_gate", "production_gate"))
    lines.append(
        "- **Asymptotic calibration.** The production gate (each partition's largest member against chi-square(s - "
        f"1), Bonferroni over the partitions, on {WINDOW} errors) rejects at {prod} in the four settings, the refit "
        f"gate (the same with each partition's Nikulin-Rao-Robson term) at {refit}. "
        + (
            "Both are far above 5 %: every member is asymptotically chi-square(s - 1), but in finite samples the "
            "members' own 95 % points differ widely (for the production table, {:.2f} to {:.2f} times the "
            "chi-square(s - 1) point, the largest at alpha {:g}, beta {:g}), so the maximum over 153 members is "
            "stochastically much larger than chi-square (docs/method.md §5.1 and §5.6). The asymptotic method is "
            "liberal for the grid maximum at these sample sizes and should serve only as a fast screen.".format(
                *result["production_nulls"]["distribution"]["reference_spread"]
            )
            if liberal
            else "Above 5 % where the table shows it: each partition's maximum over its members is "
            "stochastically larger than one chi-square(s - 1) variable in finite samples, and Bonferroni over the "
            "partitions only partly offsets it (docs/method.md §5.1 and §5.6); `asymptotic` stays a fast screen and "
            "`simulated` the default."
        )
    )
    sim = [by[(s.name, "simulated")] for s in SIZE_SCENARIOS]
    lines.append(
        "- **Simulated calibration.** Distribution-gate sizes "
        + ", ".join(
            f"{r['refit_gate']['rate']:.3f} (refit) / {r['production_gate']['rate']:.3f} (production)" for r in sim
        )
        + " in the four settings. The refit table is exact for i.i.d. location-scale noise and relies on the "
        "asymptotic negligibility of the estimated dynamic parameters for model residuals (docs/method.md §8.1-§8.2); "
        "the production table is exact for frozen parameters."
    )
    nulls = result["production_nulls"]
    ties, strict = nulls["distribution"]["ties"], nulls["distribution"]["strict"]
    lines.append(
        f"- **Production gate on its exact null.** With i.i.d. uniform PIT values it rejects at {ties['rate']:.3f} "
        f"(± {ties['se']:.3f}) against the same {result['plan'].table_seeds} tables the model settings use (the "
        "production table depends only on the window length, cells, grid and seed), so their production-gate sizes "
        "should agree with it up to binomial error; counting only strictly larger simulated values it would reject at "
        f"{strict['rate']:.3f}. "
        + (
            "The gap is the discreteness of cell counts of 56 values: the standardised maximum ties simulated values "
            "often, ties count against the observed data in p = (1 + #{R* >= r}) / (R + 1), and the gate is "
            "slightly conservative, which is what the production-gate sizes of the model settings show."
            if strict["rate"] - ties["rate"] > 2 * ties["se"]
            else "Ties between simulated and observed values matter little here."
        )
    )
    lb = ", ".join(f"{r['half']['rate']:.3f} (h = {r['lags']})" for r in nulls["ljung_box"])
    liberal_lb = all(r["half"]["rate"] > LEVEL / 2 + 3 * r["half"]["se"] for r in nulls["ljung_box"])

    def lb_rates(cal: str, kind: str) -> str:
        return ", ".join(f"{by[(sc.name, cal)][f'{kind}_independence']['rate']:.3f}" for sc in SIZE_SCENARIOS)

    lines.append(
        f"- **Independence gate and whole check.** Each gate is tested at {LEVEL / 2:g} (Bonferroni). On {WINDOW} "
        f"i.i.d. normal errors Ljung-Box against chi-square(h) rejects at {lb}"
        + (" - liberal at this length. " if liberal_lb else ", within Monte Carlo error of nominal. ")
        + f"In the four settings the production Ljung-Box gate rejects at {lb_rates('asymptotic', 'production')} "
        f"with the asymptotic calibration (chi-square reference) and at {lb_rates('simulated', 'production')} with "
        "the simulated one, which refers the production statistic to its simulated exact null (frozen parameters "
        "make the errors i.i.d.). The refit Ljung-Box gate keeps the chi-square(h - p - q) reference in every mode: "
        f"{lb_rates('simulated', 'refit')} (AR(1), ARMA(1,1), airline with h = 24 on 131 residuals, Holt-Winters with "
        "no degrees of freedom removed for the smoothing parameters). The whole-check sizes follow from the two gates."
    )
    boot = [by[(sc.name, "bootstrap")] for sc in SIZE_SCENARIOS]
    se = math.sqrt(LEVEL * (1 - LEVEL) / result["plan"].bootstrap_series)
    high = [sc.name for sc, r in zip(SIZE_SCENARIOS, boot) if r["refit_gate"]["rate"] > LEVEL + 2 * se]
    lines.append(
        f"- **Bootstrap calibration** ({result['plan'].bootstrap_series} series per setting, "
        f"{result['plan'].bootstrap_replicates} refits each): refit-gate sizes "
        + ", ".join(f"{r['refit_gate']['rate']:.3f}" for r in boot)
        + f"; a true 5 % rate has a standard error of {se:.3f} here"
        + (
            f", so {', '.join(high)} lies more than two standard errors above 5 % (the bootstrap draws from the "
            "fitted, not the true, parameters, so it is only approximately exact)."
            if high
            else ", and every rate is within two standard errors of 5 %."
        )
    )
    alt = [r for r in power_rows if r["departure"] == "distribution"]
    cand = means["candidates"]
    before = cand["means"][0]
    lines.append(
        f"- **Power.** Mean power over the {len(alt)} distributional alternatives: ours {means['ours']['rate']:.3f}, "
        f"Pearson on the equiprobable cells {means['pearson']['rate']:.3f}, likelihood-ratio "
        f"{means['likelihood-ratio']['rate']:.3f}, Jarque-Bera {means['jarque-bera']['rate']:.3f}, Anderson-Darling "
        f"{means['anderson-darling']['rate']:.3f}; the gate before this change (every grid member on the equiprobable "
        f"cells) reaches {before:.3f} on the same series. "
        + (
            "Ours is below Pearson's in "
            + ", ".join(f"{b['scenario']} by {b['pearson'] - b['ours']:.3f}" for b in g["below_pearson"])
            + ". "
            if g["below_pearson"]
            else "Ours is at least Pearson's in every alternative. "
        )
        + "The gain comes from the cells, not the members: the tail-refined cells put one expected observation in "
        "each outer cell, where heavy tails, contamination and a misstated scale show; the three broad cells see "
        "smooth departures (a bimodal law, a shifted level); the equiprobable cells sit in between. A maximum over "
        "a few classical members on these partitions pays a much smaller multiplicity price than 153 correlated "
        "members on one partition."
    )
    refit_alt = [r for r in alt if r["check"] == "refit"]
    if refit_alt:
        ours_refit = np.mean([r["ours"]["rate"] for r in refit_alt])
        ad_refit = np.mean([r["anderson-darling"]["rate"] for r in refit_alt])
        lines.append(
            f"- **Where Anderson-Darling stays ahead.** On the refit-check alternatives alone (estimated location and "
            f"scale) Anderson-Darling averages {ad_refit:.3f} against ours {ours_refit:.3f}: an EDF statistic uses "
            "every order statistic, a cell statistic only counts, and skewness in particular spreads over many "
            "cells. The production-check alternatives (a shifted level, a misstated variance) are where the audit "
            "matters most for a model in production, and there the estimated-parameter peers see nothing; "
            "Anderson-Darling with the production parameters as given is the fair peer there (column AD given)."
        )
    prod_alt = [r for r in alt if r["check"] == "production"]
    ahead = [r for r in prod_alt if r["anderson-darling (given)"]["rate"] > r["ours"]["rate"]]
    beaten = [r for r in alt if r["likelihood-ratio"]["rate"] > r["ours"]["rate"]]
    if ahead or beaten:
        lines.append(
            "- **Where a single peer is stronger.** "
            + (
                "Anderson-Darling with the production parameters as given beats ours in "
                + ", ".join(
                    f"{_short(r['scenario'])} ({r['anderson-darling (given)']['rate']:.3f} against "
                    f"{r['ours']['rate']:.3f})"
                    for r in ahead
                )
                + ": it compares every error with the stated law, while cells lose resolution in the body of the "
                "law at 56 errors. "
                if ahead
                else ""
            )
            + (
                "The likelihood-ratio member on the equiprobable cells beats ours in "
                + ", ".join(
                    f"{_short(r['scenario'])} ({r['likelihood-ratio']['rate']:.3f} against {r['ours']['rate']:.3f})"
                    for r in beaten
                )
                + ": an overstated variance thins the outer cells and crowds the centre, which many narrow cells and "
                "G2 see directly, while the gate pays for its maximum over nine (partition, member) pairs. "
                if beaten
                else ""
            )
            + "These are the alternatives to improve next."
        )
    shift = [r for r in alt if r["check"] == "production"]
    if shift:
        r = shift[0]
        lines.append(
            f"- **Level shift.** Jarque-Bera ({r['jarque-bera']['rate']:.3f}) and Anderson-Darling "
            f"({r['anderson-darling']['rate']:.3f}) estimate the mean and scale from the errors themselves and are "
            "blind to a shift of the error mean; the cell statistics use the production variance and zero mean and see "
            "it."
        )
    dep = [r for r in power_rows if r["departure"] == "dependence"]
    if dep:
        r = dep[0]
        lines.append(
            f"- **Neglected seasonality.** The independence gate rejects at {r['independence']['rate']:.3f} and the "
            f"whole check at {r['whole check']['rate']:.3f}; the distribution gate stays near its size "
            f"({r['ours']['rate']:.3f}), as it should for an order-invariant statistic."
        )
    return lines


# ---------------------------------------------------------------------------------------------
# Entry point
# ---------------------------------------------------------------------------------------------
def main(
    quick: bool = False, workers: int = 1, out: pathlib.Path | str | None = None, command: str | None = None
) -> dict:
    """Run the size and power studies and write the report.

    ``out`` is where the markdown goes; by default the full study writes ``docs/validation.md``
    and the quick mode writes nothing (so a CI run never replaces the measured record).

    Returns
    -------
    dict
        ``size`` and ``power`` rows (rates with standard errors), ``production_nulls`` (each
        production gate alone on its exact null), ``means`` (mean power per statistic), ``goals``
        (met/missed), ``plan``, ``versions``, ``seconds``, ``markdown``.
    """
    plan = QUICK if quick else FULL
    versions = _versions()
    t0 = time.perf_counter()
    size_records = run_all(size_groups(plan), workers)
    t1 = time.perf_counter()
    power_records = run_all(power_groups(plan), workers)
    t2 = time.perf_counter()
    t3 = time.perf_counter()
    nulls = production_gates_null(plan)
    t4 = time.perf_counter()
    forecast_lines = _forecast_study().run(quick=quick, workers=workers)
    size_rows = size_table(size_records, plan)
    power_rows, means = power_table(power_records)
    result = {
        "quick": quick,
        "plan": plan,
        "workers": workers,
        "command": command
        or (
            "python bench/calibration.py"
            + (" --quick" if quick else "")
            + (f" --jobs {workers}" if workers > 1 else "")
        ),
        "versions": versions,
        "seconds": {"size": t1 - t0 + t4 - t3, "power": t2 - t1, "total": t4 - t0},
        "production_nulls": nulls,
        "forecast": forecast_lines,
        "size": size_rows,
        "power": power_rows,
        "means": means,
        "goals": goals(size_rows, power_rows, means),
    }
    result["markdown"] = render(result)
    out = out if out is not None else (None if quick else DEFAULT_OUT)
    if out is not None:
        path = pathlib.Path(out)
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(result["markdown"])
    return result


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="CI-sized run (a few minutes)")
    parser.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    parser.add_argument(
        "--select",
        type=int,
        default=0,
        metavar="N",
        help=(
            "only the power study with N series per scenario on a separate seed: prints the candidate gates' mean "
            "powers"
        ),
    )
    parser.add_argument(
        "--out",
        default=None,
        help="where to write the report (default: docs/validation.md for the full run, nowhere for --quick)",
    )
    args = parser.parse_args()
    if args.select:
        # the power study alone, on its own seed, to choose the default gate before the full run
        SEED = SEED + 1  # noqa: F811 - a selection run must not reuse the reported series
        plan = dataclasses.replace(FULL, power_series=args.select)
        rows, means = power_table(run_all(power_groups(plan), args.jobs))
        cand = means["candidates"]
        for i, (label, _, _) in enumerate(CANDIDATES):
            flag = ("default " if i == cand["default"] else "") + ("chosen" if i == cand["chosen"] else "")
            print(f"{cand['means'][i]:.3f} {'yes' if i in cand['eligible'] else 'no ':3} {label} {flag}")
        print(f"{means['pearson']['rate']:.3f}     Pearson, equiprobable cells")
        sys.exit(0)
    res = main(quick=args.quick, workers=args.jobs, out=args.out, command="python " + " ".join(sys.argv))
    print(res["markdown"])
