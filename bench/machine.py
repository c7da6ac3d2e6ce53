"""The machine description every benchmark prints beside its figures."""

from __future__ import annotations

import platform


def cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as handle:
            for line in handle:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def load_average() -> str:
    try:
        with open("/proc/loadavg") as handle:
            return " ".join(handle.read().split()[:3])
    except OSError:
        return "n/a"
