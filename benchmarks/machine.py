"""The machine a benchmark ran on, described once for every script under ``benchmarks/``."""

from __future__ import annotations

import os
import platform
from pathlib import Path


def cpu_model() -> str:
    """The processor's model name (from ``/proc/cpuinfo`` where there is one)."""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine() or "unknown CPU"


def describe() -> str:
    """CPU, core count, operating system and Python version, for a figure's caption."""
    return (f"{cpu_model()}, {os.cpu_count()} cores, {platform.system()} {platform.release()}, "
            f"Python {platform.python_version()}")
