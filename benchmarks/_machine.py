"""What machine a benchmark ran on (shared by the benchmark scripts)."""

from __future__ import annotations

import platform


def cpu_model(default: str = "unknown") -> str:
    """The CPU model name from /proc/cpuinfo, else the platform's processor string, else ``default``."""
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or default
