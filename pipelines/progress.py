"""Progress of a long step, reported through the stage's log as a line a watcher can read back.

A stage that fits many series (the forecast, the backtest) knows how many it
will fit; it counts them done through a `SeriesProgress`, which writes
`progress: 40/120 series` into the same log as its other messages (in a run,
Dagster's event log). The command line reads those lines back from the run's
events to draw its progress bar and estimate the time left, whichever process
ran the step. Nothing here knows Dagster.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable
from dataclasses import dataclass

PROGRESS_LINE = re.compile(r"^progress: (\d+)/(\d+) (\w+)$")
# at most one progress line a second (the last one always), so a step fitting many small groups does not flood
# the event log
MIN_SECONDS_BETWEEN_LINES = 1.0


@dataclass(frozen=True)
class Done:
    """How far a step is: `done` of `total` units."""

    done: int
    total: int
    unit: str = "series"

    @property
    def line(self) -> str:
        return f"progress: {self.done}/{self.total} {self.unit}"


def parse_progress(message: str | None) -> Done | None:
    """The `Done` of a progress line; None for any other message."""
    match = PROGRESS_LINE.match((message or "").strip())
    if match is None:
        return None
    return Done(int(match.group(1)), int(match.group(2)), match.group(3))


class SeriesProgress:
    """Counts units done of a total known up front; reports through `log` (see the module docstring).

    `advance(n)` after each piece of work; the line is written when at least
    MIN_SECONDS_BETWEEN_LINES passed since the last one, and always when the
    total is reached. Counting past the total is a bug in the caller's total
    and raises, so an estimate of the time left never rests on a wrong total.
    """

    def __init__(self, total: int, log: Callable[[str], None] | None, unit: str = "series", clock=time.monotonic):
        if total < 0:
            raise ValueError(f"a progress total is 0 or more, got {total}")
        self.total, self.done, self.unit = int(total), 0, unit
        self._log, self._clock = log, clock
        self._last = None

    def advance(self, n: int) -> None:
        self.done += int(n)
        if self.done > self.total:
            raise ValueError(f"progress counted {self.done} {self.unit} done of a total of {self.total}")
        now = self._clock()
        recent = self._last is not None and now - self._last < MIN_SECONDS_BETWEEN_LINES
        if self._log is not None and (self.done == self.total or not recent):
            self._log(Done(self.done, self.total, self.unit).line)
            self._last = now


def seconds_left(done: int, total: int, elapsed: float) -> float | None:
    """The time left if the rest goes at the pace so far; None before the first unit is done."""
    if done <= 0 or total <= 0 or elapsed < 0:
        return None
    return max(elapsed * (total - done) / done, 0.0)
