"""Progress of long steps on the console: a bar in a terminal, a few plain lines in a log.

A progress bar redraws itself with carriage returns; in a log file (a batch job, CI,
``run > log.txt``) those pile up into one long unreadable line. When the console is not
a terminal, progress is printed as one line at each quarter instead.

The first batch of a compiled kernel includes its compilation (or loading it from the
cache), so a rate measured from the start would promise far too long a wait. The bar
therefore says "first batch (includes compiling)" until that batch is done and measures
its rate, and so its time left, from the end of the first batch on.
"""

from __future__ import annotations

import sys
from typing import TextIO

# fractions of the work at which a plain line is printed when not in a terminal
LOG_STEPS = (0.25, 0.5, 0.75, 1.0)
# shown on the bar until the first batch is done
FIRST_BATCH_NOTE = "first batch (includes compiling)"


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

            self._bar = tqdm(
                total=None,
                desc=label,
                unit=unit,
                leave=False,
                file=self.stream,
                smoothing=0,  # the average rate since the first batch (see the module)
                postfix=FIRST_BATCH_NOTE,
            )

    def update(self, done: int, total: int) -> None:
        self.done += done
        if self.quiet:
            return
        if self._bar is not None:
            bar = self._bar
            bar.total = total
            first = bar.n == 0
            bar.update(done)
            if first:
                # measure the rate (and the time left) from here on
                bar.initial = bar.n
                bar.start_t = bar.last_print_t = bar._time()
                bar.set_postfix_str("", refresh=True)
            return
        while self._next < len(LOG_STEPS) and self.done >= LOG_STEPS[self._next] * total:
            print(f"{self.label}: {self.done}/{total} {self.unit}", file=self.stream, flush=True)
            self._next += 1

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
