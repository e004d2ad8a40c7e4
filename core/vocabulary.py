"""The audit's vocabulary, defined once: verdicts, calibration modes, p-value adjustments,
cell partitions and the bounds of every policy setting.

Every other module (core, tasks, flows, templates' view models, the registry schema) imports
these names instead of restating them, so that adding a verdict or changing a bound is a change
in one place.  ``docs/architecture.md`` lists where each concept lives.
"""

from __future__ import annotations

from typing import Literal

from ._validation import Interval, Options

__all__ = [
    "Verdict",
    "VERDICTS",
    "VERDICT_MEANINGS",
    "ADJUDICATED_VERDICTS",
    "Calibration",
    "CALIBRATIONS",
    "Adjustment",
    "ADJUSTMENTS",
    "ADJUSTMENT_LABELS",
    "PartitionKind",
    "PARTITION_KINDS",
    "SETTING_BOUNDS",
]

Verdict = Literal["pass", "refit", "respecify", "insufficient", "error"]
#: Every verdict, in the order reports list them (most reassuring first).
VERDICTS: tuple[str, ...] = ("pass", "refit", "respecify", "insufficient", "error")

#: One line per verdict, for legends and help texts.
VERDICT_MEANINGS: dict[str, str] = {
    "pass": "the production parameters (or, without them, the refitted model) still describe the data",
    "refit": "the production parameters drifted; re-estimating the same model fixes it",
    "respecify": "re-estimating does not help: the model class no longer describes the series",
    "insufficient": "too little data for the checks to run; the reason names what is missing",
    "error": "the audit of this model could not run; the message names the model, the source and the fix",
}

#: Verdicts reached by the statistical checks (the fleet rules may change one into another).
ADJUDICATED_VERDICTS: tuple[str, ...] = ("pass", "refit", "respecify")

Calibration = Literal["asymptotic", "simulated", "bootstrap"]
#: How a divergence map becomes a p-value (docs/method.md §7).
CALIBRATIONS: tuple[str, ...] = ("asymptotic", "simulated", "bootstrap")

Adjustment = Literal["bh", "by", "bonferroni", "none"]
#: p-value adjustments across the checks of one run.
ADJUSTMENTS: tuple[str, ...] = ("bh", "by", "bonferroni", "none")
ADJUSTMENT_LABELS: dict[str, str] = {
    "bh": "Benjamini-Hochberg",
    "by": "Benjamini-Yekutieli",
    "bonferroni": "Bonferroni",
    "none": "no adjustment",
}

PartitionKind = Literal["equiprobable", "terciles", "quartiles", "tails"]
#: Kinds of cell partitions of the probability-integral scale (fitaudit.core.cells.make_partition):
#: ``equiprobable`` (the number of cells grows with n), ``terciles`` and ``quartiles`` (three and
#: four equiprobable cells: broad departures), ``tails`` (cells refined toward both ends).
PARTITION_KINDS: tuple[str, ...] = ("equiprobable", "terciles", "quartiles", "tails")

#: Bounds of the settings a policy or a model entry may set; ``AuditSettings`` and the registry
#: schema both read them from here.
SETTING_BOUNDS: dict[str, list] = {
    "level": [Interval(float, 0.0, 0.5, "neither")],
    "calibration": [Options(CALIBRATIONS)],
    "replicates": [Interval(int, 99, None)],
    "bootstrap_replicates": [Interval(int, 19, None)],
    "seed": [Interval(int, 0, None)],
    "fdr_q": [Interval(float, 0.0, 1.0, "neither")],
    "multiple_testing": [Options(ADJUSTMENTS)],
    "audit_window": [Interval(int, 1, None)],
    "fit_window": [Interval(int, 1, None), None],
    "lb_lags": [Interval(int, 1, None), None],
    "season": [Interval(int, 1, None)],
    "change_permutations": [Interval(int, 19, None)],
    "practical_divergence": [Interval(float, 0.0, None), None],
    "practical_acf": [Interval(float, 0.0, 1.0), None],
    "days_to_act": [Interval(int, 1, 366)],
    "flow_timeout_minutes": [Interval(int, 1, 10080)],
}
