"""Progress of long steps on the console: a bar in a terminal, a few plain lines in a log.

A progress bar redraws itself with carriage returns; in a log file (a batch job, CI,
``run > log.txt``) those pile up into one long unreadable line. When the console is not
a terminal, progress is printed as one line at each quarter instead.
"""

from __future__ import annotations

import sys
from typing import TextIO

# fractions of the work at which a plain line is printed when not in a terminal
LOG_STEPS = (0.25, 0.5, 0.75, 1.0)


class Progress:
    """``update(done, total)`` adds ``done`` finished items out of ``total``."""

    def __init__(self, label: str, unit: str, *, quiet: bool, stream: TextIO | None = None):
        self.label = label
        self.unit = unit
        self.stream = stream if stream is not None else sys.stderr
        self.quiet = quiet
        self.done = 0
        self._next = 0
        self._bar = None
        if not quiet and self.stream.isatty():
            from tqdm import tqdm

            self._bar = tqdm(total=None, desc=label, unit=unit, leave=False, file=self.stream)

    def update(self, done: int, total: int) -> None:
        self.done += done
        if self.quiet:
            return
        if self._bar is not None:
            self._bar.total = total
            self._bar.update(done)
            return
        while self._next < len(LOG_STEPS) and self.done >= LOG_STEPS[self._next] * total:
            print(f"{self.label}: {self.done}/{total} {self.unit}", file=self.stream, flush=True)
            self._next += 1

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
