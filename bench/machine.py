"""The machine a benchmark ran on, and how busy it was."""

from __future__ import annotations

import importlib.metadata
import os
import platform

__all__ = ["describe", "load_average"]


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def _ram_gib() -> float | None:
    try:
        with open("/proc/meminfo", encoding="utf-8") as fh:
            for line in fh:
                if line.startswith("MemTotal:"):
                    return int(line.split()[1]) / 2**20
    except OSError:
        pass
    return None


def _version(name: str) -> str:
    try:
        return importlib.metadata.version(name)
    except importlib.metadata.PackageNotFoundError:
        return "not installed"


def load_average() -> tuple[float, float, float] | None:
    """The 1, 5 and 15 minute load averages (None where the platform has none)."""
    try:
        return os.getloadavg()
    except OSError:
        return None


def describe() -> dict:
    """CPU model, cores, RAM, operating system and the versions the numbers depend on."""
    ram = _ram_gib()
    return {
        "cpu": _cpu_model(),
        "cores": os.cpu_count(),
        "ram": f"{ram:.1f} GiB" if ram is not None else "unknown",
        "os": f"{platform.system()} {platform.release()}",
        "python": platform.python_version(),
        **{
            name: _version(name)
            for name in ("numpy", "scipy", "statsmodels", "pyarrow", "prefect", "prefect-dask", "distributed", "jinja2")
        },
    }
