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


def results_footer(command: str) -> list[str]:
    """The closing lines of a results file: machine, load at the end, Python, date, command."""
    import datetime
    import os
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    return ["", f"Machine: {cpu_model()}, {os.cpu_count()} cores shared with other work "
            f"(load {load[0]:.2f} {load[1]:.2f} {load[2]:.2f} over 1/5/15 min at the end); "
            f"Python {platform.python_version()}; {datetime.datetime.now(datetime.timezone.utc):%Y-%m-%d %H:%M} UTC.",
            f"Command: `{command}`", ""]


def write_results(path, lines: list[str]) -> None:
    """Print a results file's text and write it to ``path``."""
    text = "\n".join(lines)
    print(text)
    path.write_text(text)
    print(f"wrote {path}")
