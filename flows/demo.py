"""``fitaudit demo``: the demo fleet, end to end, on the embedded Prefect server."""

from __future__ import annotations

import pathlib
import shutil

from fitaudit.tasks.demo import DEMO_AS_OF, demo_as_of_dates, write_demo

from .audit import audit_flow

__all__ = ["run_demo"]


def run_demo(out: str = "fitaudit-demo", fresh: bool = False, weeks: int = 3) -> dict:
    """Generate the demo (first time only), audit it and return the final run's summary.

    The first demo also audits earlier as-of dates (``weeks - 1`` of them, four weeks apart) so
    that the report shows movement, history and the escalation of a recurring refit.  Later
    demos rerun the final as-of date against the existing archive.
    """
    root = pathlib.Path(out).resolve()
    if fresh and root.exists():
        shutil.rmtree(root)
    first = not (root / "registry.yaml").exists()
    paths = write_demo(root) if first else {"registry": str(root / "registry.yaml"), "archive": str(root / "archive")}
    earlier = demo_as_of_dates()[-max(weeks, 1):-1] if first else []
    for day in earlier:
        audit_flow(registry=paths["registry"], as_of=day, archive=paths["archive"], search_candidates=False)
    return audit_flow(registry=paths["registry"], as_of=DEMO_AS_OF, archive=paths["archive"], trigger_refits=True)
