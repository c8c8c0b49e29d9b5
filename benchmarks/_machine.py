"""What the benchmark scripts report about the machine they ran on."""

from __future__ import annotations

import platform
import resource
from pathlib import Path


def cpu_model() -> str:
    """The CPU's model name from /proc/cpuinfo (or what platform knows)."""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def peak_rss_mb() -> float:
    """This process's own peak resident memory (VmHWM), in MB.

    ``ru_maxrss`` of a forked child starts from the parent's size on Linux, so VmHWM is read
    where the kernel has it.
    """
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return float(line.split()[1]) / 1024.0
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
