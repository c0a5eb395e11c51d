"""Test drivers without hardware: a resource that expects an exact conversation.

Give `FakeResourceManager` a list of (sent, reply) pairs; every pair must be used, in order,
and nothing may be left over (`assert_done()`). Replies:

* ``None``          the command has no reply
* ``"text"``        one reply line
* ``["a", "b"]``    several lines (the extra ones are stale for whoever reads next)
* ``TIMEOUT``       no reply: the next read times out
* ``Late("text")``  no reply in time; "text" arrives with the next write (a late reply)
* ``DROP``          the instrument closes the link after reading this command: reads time
                    out and later writes raise BrokenPipeError, as pyvisa-py shows it
* ``Raise(exc)``    the write itself raises exc

``("@open", None)`` expects a ``open_resource`` call at that point (``("@open", exc)`` makes
it raise exc). Reads never consume pairs; a read with nothing waiting times out at once.
A mismatch raises `ProtocolMismatch`, a BaseException so that no driver code can swallow it.
"""

from __future__ import annotations

import collections
from dataclasses import dataclass
from typing import Any

from pyvisa import constants
from pyvisa.errors import VisaIOError

from .profile import COMMON_DEFAULTS, Profile


class ProtocolMismatch(BaseException):
    """The driver sent something other than the expected conversation."""


class _Marker:
    def __init__(self, name: str):
        self.name = name

    def __repr__(self) -> str:
        return self.name


TIMEOUT = _Marker("TIMEOUT")
DROP = _Marker("DROP")


@dataclass(frozen=True)
class Late:
    text: str


@dataclass(frozen=True)
class Raise:
    exc: BaseException


def open_sequence(idn: str = "Brackwater Dynamics,test-instrument,0001,0.1",
                  profile: Profile | None = None, errors: str = '0,"No error"') -> list:
    """The conversation of opening a driver: *IDN?, *CLS, then the error queue read."""
    c = {k: t.text for k, t in profile.common.items()} if profile else COMMON_DEFAULTS
    return [("@open", None), (c["identify"], idn), (c["clear_status"], None),
            (c["next_error"], errors)]


class FakeResource:
    """Stands in for a pyvisa message-based resource."""

    def __init__(self, manager: "FakeResourceManager", name: str):
        self._m = manager
        self.resource_name = name
        self.read_termination: str | None = None
        self.write_termination: str | None = None
        self.timeout: int | None = None
        self.closed = False
        self.dead = False
        self.buffer: collections.deque[str] = collections.deque()
        self._late: list[str] = []

    def write(self, message: str) -> int:
        if self.closed:
            raise self._m._fail(f"write {message!r} to a closed resource")
        if self.dead:
            self._m.dead_writes.append(message)
            raise BrokenPipeError(32, "Broken pipe")
        self.buffer.extend(self._late)
        self._late = []
        sent, reply = self._m._next(f"write {message!r}")
        if sent == "@open":
            raise self._m._fail(f"expected a reopen of the resource, got write {message!r}")
        if sent != message:
            raise self._m._fail(f"expected {sent!r}, got {message!r}")
        self._m.writes.append((self._m._now(), message))
        if isinstance(reply, Raise):
            raise reply.exc
        if reply is None or reply is TIMEOUT:
            pass
        elif reply is DROP:
            self.dead = True
        elif isinstance(reply, Late):
            self._late.append(reply.text)
        elif isinstance(reply, str):
            self.buffer.append(reply)
        elif isinstance(reply, (list, tuple)):
            self.buffer.extend(reply)
        else:
            raise self._m._fail(f"bad reply in the protocol: {reply!r}")
        return len(message)

    def read(self) -> str:
        if self.closed:
            raise self._m._fail("read from a closed resource")
        self._m.reads += 1
        if not self.buffer:
            raise VisaIOError(constants.StatusCode.error_timeout)
        line = self.buffer.popleft()
        self._m.replies.append(line)
        return line

    def close(self) -> None:
        if not self.closed:
            self.closed = True
            self._m.closes += 1


class FakeResourceManager:
    """Hands out FakeResources that all follow one expected conversation."""

    def __init__(self, protocol: list, clock: Any = None):
        self.protocol = list(protocol)
        self.pos = 0
        self.clock = clock
        self.opened: list[tuple[str, dict]] = []
        self.resources: list[FakeResource] = []
        self.writes: list[tuple[float | None, str]] = []
        self.replies: list[str] = []
        self.dead_writes: list[str] = []
        self.reads = 0
        self.closes = 0
        self.mismatch: str | None = None
        self.closed = False

    def _now(self) -> float | None:
        return self.clock.now() if self.clock is not None else None

    def _fail(self, text: str) -> ProtocolMismatch:
        msg = f"step {self.pos}: {text}"
        self.mismatch = self.mismatch or msg
        return ProtocolMismatch(msg)

    def _next(self, what: str) -> tuple:
        if self.pos >= len(self.protocol):
            raise self._fail(f"{what} after the end of the expected protocol")
        item = self.protocol[self.pos]
        self.pos += 1
        return item

    def open_resource(self, resource_name: str, **kwargs: Any) -> FakeResource:
        sent, reply = self._next(f"open_resource({resource_name!r})")
        if sent != "@open":
            raise self._fail(f"expected {sent!r}, got open_resource({resource_name!r})")
        self.opened.append((resource_name, kwargs))
        if isinstance(reply, BaseException):
            raise reply
        res = FakeResource(self, resource_name)
        self.resources.append(res)
        return res

    def close(self) -> None:
        self.closed = True

    @property
    def current(self) -> FakeResource | None:
        return self.resources[-1] if self.resources else None

    @property
    def sent(self) -> list[str]:
        return [m for _, m in self.writes]

    def assert_done(self) -> None:
        """Every expected pair used, no reply and no late reply left over."""
        if self.mismatch:
            raise AssertionError(self.mismatch)
        if self.pos != len(self.protocol):
            rest = self.protocol[self.pos:]
            raise AssertionError(f"{len(rest)} expected step(s) not used, next: {rest[0]!r}")
        for r in self.resources:
            if r.buffer or r._late:
                raise AssertionError(f"reply left over: {list(r.buffer) + r._late!r}")
