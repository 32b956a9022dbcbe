"""Machine facts for host.json (what the runs were measured on).

Read from psutil, `platform` and /proc or /sys where readable; anything the
machine does not expose is recorded as null rather than guessed.
"""

from __future__ import annotations

import os
import platform
import sys
from pathlib import Path


def _read(path: str) -> str | None:
    try:
        return Path(path).read_text().strip()
    except OSError:
        return None


def cpu_model() -> str | None:
    text = _read("/proc/cpuinfo") or ""
    for line in text.splitlines():
        if line.lower().startswith(("model name", "hardware", "cpu model")):
            return line.split(":", 1)[1].strip()
    return platform.processor() or None


def load_average() -> list[float] | None:
    try:
        return [round(x, 3) for x in os.getloadavg()]
    except OSError:
        return None


def collect_facts() -> dict:
    """Facts of this machine for host.json."""
    import psutil

    freq = None
    try:
        f = psutil.cpu_freq()
        if f:
            freq = {"current_mhz": f.current, "min_mhz": f.min, "max_mhz": f.max}
    except (OSError, NotImplementedError):
        pass
    uname = platform.uname()
    return {
        "hostname": uname.node,
        "cpu_model": cpu_model(),
        "physical_cores": psutil.cpu_count(logical=False),
        "logical_cores": psutil.cpu_count(logical=True),
        "memory_bytes": psutil.virtual_memory().total,
        "os": uname.system,
        "kernel": uname.release,
        "machine": uname.machine,
        "python": sys.version.split()[0],
        "python_implementation": platform.python_implementation(),
        "load_average_start": load_average(),
        "cpu_frequency": freq,
        "frequency_governor": _read("/sys/devices/system/cpu/cpu0/cpufreq/scaling_governor"),
    }
