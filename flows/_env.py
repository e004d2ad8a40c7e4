"""Prefect environment for fitaudit's command line: quiet, local, reproducible.

Must run before anything imports prefect.  Unless the user configured Prefect (``PREFECT_API_URL``,
``PREFECT_HOME`` or ``PREFECT_PROFILE`` set), Prefect's home and database live in ``./.prefect``
and runs use the embedded (ephemeral) server.  Server-side shutdown noise is silenced with a
``logging.yml`` derived from Prefect's own default configuration.
"""

from __future__ import annotations

import importlib.util
import os
import pathlib

__all__ = ["configure_prefect", "QUIET_SETTINGS"]

QUIET_SETTINGS = {
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "DO_NOT_TRACK": "1",
    "PREFECT_LOGGING_LEVEL": "WARNING",
    "PREFECT_SERVER_LOGGING_LEVEL": "CRITICAL",
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
    "PREFECT_TASKS_DEFAULT_NO_CACHE": "true",
    "PREFECT_LOGGING_TO_API_WHEN_MISSING_FLOW": "ignore",
    "PREFECT_SERVER_UI_ENABLED": "false",
    # many small optimisations: a threaded BLAS only adds contention on a few cores
    "OPENBLAS_NUM_THREADS": "1",
    "OMP_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
}

# loggers that print ERROR lines while Prefect's embedded server shuts down
_SILENCED = ("prefect.server.services.task_run_recorder", "prefect.server.services.telemetry", "sqlalchemy.pool", "docket")


def _write_logging_config(home: pathlib.Path) -> pathlib.Path:
    """Prefect's default logging.yml plus CRITICAL level for the shutdown-noise loggers."""
    import yaml

    target = home / "logging.yml"
    if target.exists():
        return target
    spec = importlib.util.find_spec("prefect")
    base = pathlib.Path(next(iter(spec.submodule_search_locations))) / "logging" / "logging.yml"
    config = yaml.safe_load(base.read_text())
    for name in _SILENCED:
        config.setdefault("loggers", {})[name] = {"level": "CRITICAL"}
    home.mkdir(parents=True, exist_ok=True)
    tmp = target.with_suffix(".tmp")
    tmp.write_text(yaml.safe_dump(config, sort_keys=False))
    os.replace(tmp, target)
    return target


def configure_prefect(workdir: str | os.PathLike | None = None) -> dict:
    """Set the process environment for a quiet local Prefect run; returns what was chosen.

    Idempotent, and never overrides a setting the user gave.
    """
    user_configured = any(k in os.environ for k in ("PREFECT_API_URL", "PREFECT_HOME", "PREFECT_PROFILE"))
    if not user_configured:
        home = pathlib.Path(workdir or os.getcwd()).resolve() / ".prefect"
        os.environ["PREFECT_HOME"] = str(home)
        os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_ENABLED", "true")
    for key, value in QUIET_SETTINGS.items():
        os.environ.setdefault(key, value)
    home = pathlib.Path(os.environ.get("PREFECT_HOME", pathlib.Path.home() / ".prefect"))
    if "PREFECT_LOGGING_CONFIG_PATH" not in os.environ:
        os.environ["PREFECT_LOGGING_CONFIG_PATH"] = str(_write_logging_config(home))
    return {
        "home": str(home),
        "api_url": os.environ.get("PREFECT_API_URL"),
        "embedded": "PREFECT_API_URL" not in os.environ,
        "user_configured": user_configured,
    }
