"""Package-level configuration, read from the environment or ``prefect.toml``.

``PREFECT_INTEGRATIONS_FITAUDIT_ARCHIVE_ROOT=/srv/archive`` or, in ``prefect.toml``::

    [integrations.fitaudit]
    archive_root = "/srv/archive"
    batch_size = 100
    processes = 2
    report_base_url = "https://audit.example.org/fitaudit/"
"""

from __future__ import annotations

from pathlib import Path

from prefect.settings.base import PrefectBaseSettings, build_settings_config
from pydantic import Field

__all__ = ["FitauditSettings", "get_settings"]


class FitauditSettings(PrefectBaseSettings):
    """Static configuration of the fitaudit plugin (per-run choices are flow parameters)."""

    model_config = build_settings_config(("integrations", "fitaudit"))

    archive_root: Path = Field(default=Path("./archive"), description="Folder of the tamper-evident archive.")
    registry_path: Path = Field(default=Path("./registry.yaml"), description="The model registry (YAML).")
    batch_size: int = Field(default=0, ge=0, description="Models per Prefect task; 0 chooses automatically.")
    processes: int = Field(
        default=0,
        ge=0,
        description=(
            "Local worker processes for the batches under the default task runner; 0 uses every CPU, 1 "
            "computes in the task threads."
        ),
    )
    model_time_limit_s: float = Field(
        default=900.0,
        ge=0,
        description=(
            "Wall-clock limit per model audit, enforced in the local worker processes (an error verdict when "
            "reached); 0 disables."
        ),
    )
    reuse_null_tables: bool = Field(
        default=True,
        description=(
            "Keep the simulated null tables in <archive>/.tables and reuse them in later runs (a table depends "
            "only on its key, the seed and fitaudit's code, so the results are the same); false simulates every "
            "table in every run."
        ),
    )
    operator: str = Field(default="", description="Operator or service account recorded in each manifest.")
    report_base_url: str = Field(
        default="",
        pattern=r"^(https?://\S+)?$",
        description="Where the archive is served or synced (http or https, e.g. https://audit.example.org/fitaudit/): "
        "report links in Prefect's artifacts, events and notifications become <base>/runs/<YYYY>/<run-id>/index.html "
        "instead of file:// links, which do not open from Prefect's UI. Empty: file:// links.",
    )


def get_settings() -> FitauditSettings:
    """Fresh settings object (reads the environment at call time)."""
    return FitauditSettings()
