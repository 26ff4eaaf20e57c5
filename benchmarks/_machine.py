"""Machine facts the benchmarks print beside their numbers."""
from __future__ import annotations

import platform


def cpu_name() -> str:
    """The processor's model name (from /proc/cpuinfo where there is one)."""
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"
