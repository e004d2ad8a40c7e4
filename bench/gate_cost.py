"""Cost of the distribution gate per model audit: the default gate over partitions against the
single-partition gate it replaced (every (alpha, beta) of the grid on the equiprobable cells).

Both run ``audit_series`` on the same AR(1) series with a production version (both checks,
simulated calibration), with their null tables built beforehand (a run builds each table once and
shares it, so tables are reported apart); the two settings alternate within each repeat, so a busy
machine slows both alike.  Goal (docs/validation.md): at most 1.5 times the replaced gate's time.
"""

from __future__ import annotations

import dataclasses
import statistics
import time

import numpy as np

from fitaudit.core.audit import AuditSettings, audit_series, prepare_calibration
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.models import Arima

AR1 = Arima(order=(1, 0, 0), trend="c")
TRUTH = {"ar1": 0.6, "intercept": 10.0, "sigma2": 1.0}
NEW = AuditSettings(locate_change=False)
OLD = dataclasses.replace(NEW, partitions=("equiprobable",), gate_members=None)
GOAL = 1.5


def _time_audits(series: list[np.ndarray], settings: AuditSettings, cache: CalibrationCache) -> float:
    t0 = time.perf_counter()
    for y in series:
        audit_series(y, AR1, production=TRUTH, settings=settings, cache=cache)
    return (time.perf_counter() - t0) / len(series)


def main(quick: bool = False) -> list[dict]:
    n_series, n, repeats = (40, 365, 3) if quick else (200, 730, 5)
    rng = np.random.default_rng(2026)
    series = [AR1.simulate(TRUTH, n, rng) for _ in range(n_series)]
    caches, build = {}, {}
    for name, settings in (("new", NEW), ("old", OLD)):
        t0 = time.perf_counter()
        caches[name] = prepare_calibration([(AR1, "normal", settings, n, True)])
        build[name] = time.perf_counter() - t0
    per_model = {"new": [], "old": []}
    for _ in range(repeats):
        for name, settings in (("old", OLD), ("new", NEW)):
            per_model[name].append(_time_audits(series, settings, caches[name]))
    new, old = statistics.median(per_model["new"]), statistics.median(per_model["old"])
    ratio = new / old
    return [
        {
            "benchmark": "Distribution gate cost per model audit",
            "size": f"{n_series} AR(1) series of {n}, both checks, simulated calibration, median of {repeats}",
            "measured": (
                f"gate over {'+'.join(NEW.partitions)} x {len(NEW.gate_members)} members {1e3 * new:.2f} ms, "
                f"replaced gate (153 members on the equiprobable cells) {1e3 * old:.2f} ms per model; "
                f"tables built once per run: {build['new']:.1f} s against {build['old']:.1f} s"
            ),
            "ratio": ratio,
            "ratio_text": f"{ratio:.2f}x",
            "goal": f"<= {GOAL}x the replaced gate",
            "met": ratio <= GOAL,
        }
    ]


if __name__ == "__main__":
    for row in main():
        print(row)
