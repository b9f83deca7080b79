"""A process's own peak memory, for the benchmarks' child processes."""

from __future__ import annotations

import resource
import sys


def peak_rss_mb() -> float:
    """This process's peak resident memory so far, in MB.

    On Linux, ``VmHWM`` of /proc/self/status: the peak of the process's own address
    space. ``ru_maxrss`` survives execve, so a child started by a benchmark that holds a
    large generated workload reports the parent's footprint at fork instead of its own
    (the split stage alone read 2,109 MB cold and rebuild alike under ``make
    bench-scale``, whose process held the generated manifests, and 1.2 to 1.4 GB from a
    small parent). Elsewhere ``ru_maxrss`` (kilobytes on Linux, bytes on macOS).
    """
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return peak / (1024 * 1024 if sys.platform == "darwin" else 1024)
