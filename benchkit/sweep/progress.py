"""Progress of a sweep: a bar with ETA on a terminal; otherwise (a log file, CI) a compact
plain line at every tenth of the sweep and at the last point, not one per point.

The ETA comes from the wall time spent per point in this session, so it is right for real
runs and for virtual-clock runs alike (and after a resume it ignores the earlier session).
"""

from __future__ import annotations

import sys
import time
from typing import Callable, TextIO


def format_duration(seconds: float) -> str:
    s = max(0, int(round(seconds)))
    h, rem = divmod(s, 3600)
    m, s = divmod(rem, 60)
    if h:
        return f"{h}h{m:02d}m"
    if m:
        return f"{m}m{s:02d}s"
    return f"{s}s"


class Progress:
    """Reports points done out of the total; `tty=None` asks the stream."""

    # Without a terminal, a line each time another STEP_PCT of the points is done.
    STEP_PCT = 10

    def __init__(self, stream: TextIO | None = None, tty: bool | None = None, width: int = 28,
                 wall: Callable[[], float] = time.monotonic):
        self.stream = stream if stream is not None else sys.stderr
        if tty is None:
            isatty = getattr(self.stream, "isatty", None)
            tty = bool(isatty and isatty())
        self.tty = tty
        self.width = width
        self.wall = wall
        self.total = 0
        self.done = 0
        self._first_done = 0
        self._t0 = 0.0
        self._open_line = False
        self._next_pct = 0.0

    def start(self, total: int, done: int = 0) -> None:
        self.total, self.done, self._first_done = total, done, done
        self._t0 = self.wall()
        self._next_pct = self._milestone(done)
        if not self.tty:
            self._write(f"sweep: {total} points planned" + (f", {done} already done" if done else "") + "\n")

    def eta_s(self) -> float | None:
        n = self.done - self._first_done
        if n <= 0:
            return None
        return (self.wall() - self._t0) / n * (self.total - self.done)

    def point(self, done: int, text: str) -> None:
        self.done = done
        eta = self.eta_s()
        eta_text = "ETA --" if eta is None else f"ETA {format_duration(eta)}"
        pct = 100.0 * done / self.total if self.total else 100.0
        if self.tty:
            fill = int(round(self.width * done / self.total)) if self.total else self.width
            bar = "#" * fill + "." * (self.width - fill)
            self._write(f"\r[{bar}] {done}/{self.total} {pct:3.0f}% {eta_text}  {text}\x1b[K")
            self._open_line = True
        elif pct >= self._next_pct or done >= self.total:
            self._write(f"point {done}/{self.total} ({pct:.0f}%): {text}; {eta_text}\n")
            self._next_pct = self._milestone(done)

    def _milestone(self, done: int) -> float:
        """The next percentage at which the plain mode writes a line."""
        pct = 100.0 * done / self.total if self.total else 100.0
        return (int(pct // self.STEP_PCT) + 1) * self.STEP_PCT

    def note(self, text: str) -> None:
        self._end_line()
        self._write(f"{text}\n")

    def finish(self, status: str) -> None:
        self._end_line()
        self._write(f"sweep {status}: {self.done}/{self.total} points\n")

    def _end_line(self) -> None:
        if self._open_line:
            self._write("\n")
            self._open_line = False

    def _write(self, text: str) -> None:
        try:
            self.stream.write(text)
            self.stream.flush()
        except (OSError, ValueError):
            pass  # a closed terminal must not stop the sweep
