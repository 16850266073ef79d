"""What the machine offers the computation: the processor cores this process may use."""

from __future__ import annotations

import os


def available_cores() -> int:
    """Cores this process may run on (its CPU affinity where the system reports one).

    ``os.sched_getaffinity`` exists on Linux only; elsewhere (macOS, Windows) every core
    of the machine is counted. At least 1.
    """
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # platforms without sched_getaffinity
        return max(1, os.cpu_count() or 1)
