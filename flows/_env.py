"""Prefect environment for fitaudit's command line: quiet, local, reproducible.

Must run before anything imports prefect.  Unless the user configured Prefect (``PREFECT_API_URL``,
``PREFECT_HOME`` or ``PREFECT_PROFILE`` set), Prefect's home and database live in ``./.prefect``
and runs use the embedded (ephemeral) server.  The ``logging.yml`` written to Prefect's home is
Prefect's own default configuration with three changes: the logs of flow and task runs are kept
at INFO, so they reach the Prefect API (the UI shows what each run did); the console shows only
what ``PREFECT_LOGGING_LEVEL`` lets through (WARNING by default: the command prints its own
progress lines); and the loggers that print errors while Prefect's embedded server shuts down are
silenced.
"""

from __future__ import annotations

import importlib.util
import os
import pathlib

__all__ = ["configure_prefect", "logging_config", "QUIET_SETTINGS", "RUN_LOG_LEVEL"]

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
_SILENCED = (
    "prefect.server.services.task_run_recorder",
    "prefect.server.services.telemetry",
    "sqlalchemy.pool",
    "docket",
)


#: Loggers of flow and task runs: kept at this level, so that their records reach the Prefect API.
RUN_LOG_LEVEL = "INFO"


def logging_config() -> dict:
    """Prefect's default logging configuration with fitaudit's changes (see the module's text)."""
    import yaml

    spec = importlib.util.find_spec("prefect")
    base = pathlib.Path(next(iter(spec.submodule_search_locations))) / "logging" / "logging.yml"
    config = yaml.safe_load(base.read_text())
    loggers = config.setdefault("loggers", {})
    for name in ("prefect.flow_runs", "prefect.task_runs"):
        loggers[name] = {**loggers.get(name, {}), "level": RUN_LOG_LEVEL, "handlers": ["api"]}
    # the console prints what PREFECT_LOGGING_LEVEL lets through; the API handler takes every run record
    config.setdefault("handlers", {}).setdefault("console", {})["level"] = "${PREFECT_LOGGING_LEVEL}"
    for name in _SILENCED:
        loggers[name] = {"level": "CRITICAL"}
    return config


def _write_logging_config(home: pathlib.Path) -> pathlib.Path:
    """Write :func:`logging_config` to ``<home>/logging.yml`` (rewritten when it differs)."""
    import yaml

    target = home / "logging.yml"
    text = yaml.safe_dump(logging_config(), sort_keys=False)
    if target.exists() and target.read_text() == text:
        return target
    home.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f"logging.yml.{os.getpid()}.tmp")
    tmp.write_text(text)
    os.replace(tmp, target)
    return target


def prefect_home() -> pathlib.Path:
    """Prefect's home folder: ``PREFECT_HOME``, or Prefect's default ``~/.prefect``."""
    return pathlib.Path(os.environ.get("PREFECT_HOME") or str(pathlib.Path.home() / ".prefect"))


def configure_prefect(workdir: str | os.PathLike | None = None, write_logging: bool = True) -> dict:
    """Set the process environment for a quiet local Prefect run; returns what was chosen.

    ``write_logging=False`` writes nothing (commands that never start a flow, such as ``verify``,
    must not leave a ``.prefect`` folder in the working directory: it may be inside an archive).

    Idempotent, and never overrides a setting the user gave.
    """
    user_configured = any(k in os.environ for k in ("PREFECT_API_URL", "PREFECT_HOME", "PREFECT_PROFILE"))
    if not user_configured:
        home = pathlib.Path(workdir or os.getcwd()).resolve() / ".prefect"
        os.environ["PREFECT_HOME"] = str(home)
        os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_ENABLED", "true")
    for key, value in QUIET_SETTINGS.items():
        os.environ.setdefault(key, value)
    home = prefect_home()
    if write_logging and "PREFECT_LOGGING_CONFIG_PATH" not in os.environ:
        os.environ["PREFECT_LOGGING_CONFIG_PATH"] = str(_write_logging_config(home))
    return {
        "home": str(home),
        "api_url": os.environ.get("PREFECT_API_URL"),
        "embedded": "PREFECT_API_URL" not in os.environ,
        "user_configured": user_configured,
    }
