"""One clock for the bench physics and the sweep: real time, or virtual time for tests.

With a VirtualClock an hour of dwell passes in no time while every command still goes through
pyvisa and TCP. The sweep engine and the simulated bench share one clock object in-process.
"""

from __future__ import annotations

import threading
import time


class RealClock:
    """Monotonic wall time."""

    virtual = False

    def now(self) -> float:
        return time.monotonic()

    def sleep(self, seconds: float) -> None:
        if seconds > 0:
            time.sleep(seconds)


class VirtualClock:
    """Time that moves only when someone sleeps on it.

    `speed=None`: sleeping advances the clock at once. `speed=k`: sleeping also waits
    seconds/k of real time, so that a subprocess can be interrupted mid-sweep in a test.
    """

    virtual = True

    def __init__(self, start_s: float = 0.0, speed: float | None = None):
        self._t = float(start_s)
        self._lock = threading.Lock()
        self.speed = speed

    def now(self) -> float:
        with self._lock:
            return self._t

    def advance(self, seconds: float) -> None:
        if seconds < 0:
            raise ValueError("a clock does not run backwards")
        with self._lock:
            self._t += seconds

    def sleep(self, seconds: float) -> None:
        if seconds <= 0:
            return
        if self.speed:
            time.sleep(seconds / self.speed)
        self.advance(seconds)
