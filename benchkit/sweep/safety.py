"""Stopping a sweep without leaving a charged part or a half-answered instrument behind.

SIGINT (Ctrl-C) and SIGTERM become `Interrupted`, raised in the sweep's thread. The first
signal waits until the instrument transaction in flight has completed (a query cut between
its write and its read would leave a stale reply on the link, which the shutdown then
misreads); a second one interrupts at once. Waiting (dwell, ramp pauses) is not a transaction,
so a signal stops it at once. While the shutdown runs (ramp down, output off, save), further
signals only print a note. atexit is the last resort for a supply nobody switched off.
"""

from __future__ import annotations

import atexit
import signal
import sys
import threading
from typing import Any, Callable

STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)


class Interrupted(BaseException):
    """The operator (SIGINT) or the system (SIGTERM) asked the sweep to stop.

    A BaseException, like KeyboardInterrupt, so that no `except Exception` on the way
    swallows it.
    """

    def __init__(self, signal_name: str, forced: bool = False, deferred: bool = False):
        self.signal_name = signal_name
        self.forced = forced
        self.deferred = deferred
        if forced:
            how = " (second signal: stopped at once)"
        elif deferred:
            how = " (stopped after the instrument transaction in flight)"
        else:
            how = ""
        super().__init__(f"{signal_name} received{how}")


class SignalGuard:
    """Installs the stop handlers for the duration of a `with` block (main thread only)."""

    def __init__(self, stream=None, signals=STOP_SIGNALS):
        self.stream = stream if stream is not None else sys.stderr
        self.signals = signals
        self.pending: str | None = None
        self._depth = 0
        self._stopping = False
        self._saved: dict[int, Any] = {}
        self.installed = False

    # -- context -------------------------------------------------------------
    def __enter__(self) -> "SignalGuard":
        if threading.current_thread() is threading.main_thread():
            for s in self.signals:
                self._saved[s] = signal.signal(s, self._handler)
            self.installed = True
        return self

    def __exit__(self, *exc) -> None:
        for s, old in self._saved.items():
            signal.signal(s, old)
        self._saved.clear()
        self.installed = False

    # -- handler -------------------------------------------------------------
    def _say(self, text: str) -> None:
        try:
            print(f"benchkit: {text}", file=self.stream, flush=True)
        except Exception:
            pass

    def _handler(self, signum, frame) -> None:
        name = signal.Signals(signum).name
        if self._stopping:
            self._say(f"{name}: already stopping safely (ramping down, output off, saving); please wait")
            return
        if self.pending is None:
            self.pending = name
            if self._depth > 0:
                self._say(f"{name}: stopping after the instrument transaction in flight (again to stop at once)")
                return
            raise Interrupted(name)
        raise Interrupted(name, forced=True)

    # -- API for the engine --------------------------------------------------
    def transaction(self) -> "_Transaction":
        """Context for one bus transaction: a first signal waits for its end."""
        return _Transaction(self)

    def check(self) -> None:
        """Raise a deferred stop request now (call between transactions)."""
        if self.pending is not None and self._depth == 0 and not self._stopping:
            raise Interrupted(self.pending, deferred=True)

    def stopping(self) -> None:
        """From here on (shutdown in progress) signals are noted, not raised."""
        self._stopping = True

    def window_sleep(self, sleep: Callable[[float], None], seconds: float) -> None:
        """A pause during which a signal stops at once, even inside a longer driver call."""
        saved, self._depth = self._depth, 0
        try:
            self.check()
            sleep(seconds)
            self.check()
        finally:
            self._depth = saved


class _Transaction:
    def __init__(self, guard: SignalGuard):
        self.g = guard

    def __enter__(self):
        self.g._depth += 1
        return self

    def __exit__(self, exc_type, exc, tb):
        self.g._depth -= 1
        if exc_type is None:
            self.g.check()
        return False


class GuardedClock:
    """The run's clock, with its sleeps opened as stop windows (given to BiasSupply.ramp_to)."""

    def __init__(self, clock, guard: SignalGuard):
        self._clock = clock
        self._guard = guard
        self.virtual = getattr(clock, "virtual", False)

    def now(self) -> float:
        return self._clock.now()

    def sleep(self, seconds: float) -> None:
        self._guard.window_sleep(self._clock.sleep, seconds)

    def __getattr__(self, name):
        return getattr(self._clock, name)


class Guarded:
    """An instrument whose every query, setting and method call is one guarded transaction."""

    def __init__(self, inst, guard: SignalGuard):
        object.__setattr__(self, "_inst", inst)
        object.__setattr__(self, "_guard", guard)

    def __getattr__(self, name):
        with self._guard.transaction():
            value = getattr(self._inst, name)
        if callable(value):
            guard = self._guard

            def call(*args, **kwargs):
                with guard.transaction():
                    return value(*args, **kwargs)

            return call
        return value

    def __setattr__(self, name, value) -> None:
        with self._guard.transaction():
            setattr(self._inst, name, value)


# -- last resort -----------------------------------------------------------------------

_armed: dict[int, Callable[[], Any]] = {}
_lock = threading.Lock()


def arm_last_resort(safe_off: Callable[[], Any]) -> int:
    """Register a 0 V + output off call for interpreter exit; returns a token for disarm."""
    with _lock:
        token = id(safe_off)
        _armed[token] = safe_off
    return token


def disarm_last_resort(token: int) -> None:
    with _lock:
        _armed.pop(token, None)


@atexit.register
def _fire_last_resort() -> None:
    with _lock:
        calls = list(_armed.values())
        _armed.clear()
    for call in calls:
        try:
            call()
        except BaseException:  # exit is under way; nothing better to do
            pass
