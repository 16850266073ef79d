"""Wall time per step of a run, for the line ``grouplevel run`` prints at the end.

A :class:`StepClock` adds up the wall time spent in named steps (a step may be entered
many times, e.g. once per condition), in the order the steps were first entered. It
measures and reports; it changes nothing the run computes.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager


class StepClock:
    """Wall seconds per named step, summed over every time the step was entered."""

    def __init__(self) -> None:
        self.seconds: dict[str, float] = {}

    @contextmanager
    def step(self, name: str) -> Iterator[None]:
        """Time the ``with`` block and add it to step ``name``."""
        start = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[name] = self.seconds.get(name, 0.0) + time.perf_counter() - start

    def line(self) -> str:
        """``"time per step: read 1.2 s · fit 0.9 s · … (total 4.1 s)"``."""
        parts = [f"{name} {s:.1f} s" for name, s in self.seconds.items()]
        total = sum(self.seconds.values())
        return f"time per step: {' · '.join(parts)} (total {total:.1f} s)"
