"""``fitaudit demo``: the demo fleet, end to end, on the embedded Prefect server."""

from __future__ import annotations

import pathlib
import shutil
from collections.abc import Callable

from fitaudit.demo import DEMO_AS_OF, demo_as_of_dates, write_demo

from .audit import audit_flow

__all__ = ["run_demo"]


def _summary(result: dict) -> str:
    counts = result["counts"]
    shown = ", ".join(
        f"{k} {counts[k]}" for k in ("pass", "refit", "respecify", "insufficient", "error") if counts.get(k)
    )
    return f"run {result['run_id']}: {counts['registered']} models, {shown}"


def run_demo(
    out: str = "fitaudit-demo", fresh: bool = False, weeks: int = 3, progress: Callable[[str], None] | None = None
) -> dict:
    """Generate the demo (first time only), audit it and return the final run's summary.

    The first demo also audits earlier as-of dates (``weeks - 1`` of them, four weeks apart) so
    that the report shows movement, history and the escalation of a recurring refit.  Later
    demos rerun the final as-of date against the existing archive.  The final audit starts one
    refit run for the models it flags (its ``refits`` in the result).  ``progress`` receives one
    line per step.
    """
    say = progress or (lambda line: None)
    root = pathlib.Path(out).resolve()
    if fresh and root.exists():
        say(f"removing {root}")
        shutil.rmtree(root)
    first = not (root / "registry.yaml").exists()
    if first:
        say(f"writing the demo extract, registry and archive to {root}")
    paths = write_demo(root) if first else {"registry": str(root / "registry.yaml"), "archive": str(root / "archive")}
    earlier = demo_as_of_dates()[-max(weeks, 1) : -1] if first else []
    for k, day in enumerate(earlier, start=1):
        say(f"audit {k} of {len(earlier) + 1}: as of {day} (an earlier week, so the report has history)")
        say(
            _summary(
                audit_flow(registry=paths["registry"], as_of=day, archive=paths["archive"], search_candidates=False)
            )
        )
    say(
        f"audit {len(earlier) + 1} of {len(earlier) + 1}: as of {DEMO_AS_OF}, "
        "then one refit run for the models it flags"
    )
    result = audit_flow(
        registry=paths["registry"],
        as_of=DEMO_AS_OF,
        archive=paths["archive"],
        trigger_refits=True,
        progress=progress is not None,
    )
    say(_summary(result))
    refits = result.get("refits")
    if refits:
        say(
            f"refit run {refits['run_id']} refitted {', '.join(r['model_id'] for r in refits['records'])}: "
            f"{refits['path']}"
        )
    else:
        say("no model was flagged for a refit")
    return result
