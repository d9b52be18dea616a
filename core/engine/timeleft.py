"""The time left of a long computation, from its progress(done, total) calls.

One estimator for the terminal bar and the workbench: the average rate since the first
call (no moving average: steadier, and the first call already excludes start-up such as
loading and the whole-text pass), and nothing before SHOW_AFTER of the work is done, when
an estimate from a few batches means little."""

from __future__ import annotations

import time
from typing import Callable

SHOW_AFTER = 0.05


class TimeLeft:
    def __init__(self, clock: Callable[[], float] = time.monotonic, show_after: float = SHOW_AFTER):
        self.clock = clock
        self.show_after = show_after
        self.total: int | None = None
        self.first: tuple[float, int] | None = None

    def update(self, done: int, total: int) -> float | None:
        """Seconds left after this call, or None while the estimate would mean nothing."""
        now = self.clock()
        if total != self.total or self.first is None:
            self.total, self.first = total, (now, done)
            return None
        t0, d0 = self.first
        if total <= 0 or done / total < self.show_after or done <= d0 or now <= t0:
            return None
        return (now - t0) / (done - d0) * (total - done)


def time_left_text(seconds: float | None) -> str:
    """"12 s left", "4 min left", "1 h 05 min left"; "" when there is no estimate."""
    if seconds is None:
        return ""
    s = max(0, round(seconds))
    if s < 60:
        return f"{s} s left"
    if s < 3600:
        return f"{round(s / 60)} min left"
    h, m = divmod(round(s / 60), 60)
    return f"{h} h {m:02d} min left"
