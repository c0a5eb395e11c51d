"""Faults the simulated bench can inject, so that recovery paths are tested over a real link.

Spec text: `KIND[:after=N][:role=R][:OPTION=VALUE]...`, e.g. `drop:after=40`,
`late:after=10:delay=1.5`, `temp-drift:rate=0.5`, `current-limit:limit=1e-6`.

Counting: each instrument counts the non-empty lines (messages) it receives, over all its
connections. A fault is armed when the bench starts (faults given to SimBench) or when it is
injected; `after=N` lets N messages to the trigger instrument pass untouched and acts on
message N+1. Faults about a reply (timeout, garble, late) act on the first query from
message N+1 on.

| kind | default role | effect | lifetime |
|---|---|---|---|
| timeout | meter | the query is executed but its reply is never sent | once |
| drop | meter | the server closes the connection instead of executing the message; the instrument keeps its state and accepts a new connection | once |
| garble | meter | the reply is cut to half its length and ends in `#~` | once |
| error | meter | `code` (default -222) is pushed into the instrument's error queue; the message itself runs normally | once |
| late | meter | the reply is sent `delay` seconds of real time late (default 10 s, twice a typical 5 s timeout) | once |
| overload | meter | the next `count` (default 1) FETCh?/READ? answers are 9.9E37 | once |
| current-limit | supply | the supply's effective current limit drops to `limit` A (default 1e-7) | stays |
| temp-drift | thermometer | the chamber temperature ramps by `rate` degC per clock minute (default 0.5) | stays |
| refuse | chamber | the next `count` (default 1) set points are refused: error -221, the set point stays as it was | once |
| unstable | chamber | the chamber's controller hunts by `amp` degC (default 3) around its set point, so it never reports STABLE | stays |

`role=R` picks which instrument's messages are counted; the effect stays where the table
says (overload on the meter, current-limit on the supply, temp-drift on the chamber, refuse
and unstable on the chamber). Timeout, drop, garble, late and error act on the chamber's link
with `role=chamber`.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass
from typing import Callable, Mapping

ROLES = ("meter", "supply", "scanner", "thermometer", "chamber")

DEFAULT_ROLE = {
    "timeout": "meter",
    "drop": "meter",
    "garble": "meter",
    "error": "meter",
    "late": "meter",
    "overload": "meter",
    "current-limit": "supply",
    "temp-drift": "thermometer",
    "refuse": "chamber",
    "unstable": "chamber",
}
KINDS = tuple(DEFAULT_ROLE)

REPLY_KINDS = ("timeout", "garble", "late")  # act on a query's reply
LASTING_KINDS = ("current-limit", "temp-drift", "unstable")

# option name in the spec -> (field name, type, kinds it applies to)
_OPTIONS: dict[str, tuple[str, type, tuple[str, ...]]] = {
    "after": ("after", int, KINDS),
    "role": ("role", str, KINDS),
    "delay": ("delay_s", float, ("late",)),
    "rate": ("rate_C_per_min", float, ("temp-drift",)),
    "limit": ("limit_A", float, ("current-limit",)),
    "count": ("count", int, ("overload", "refuse")),
    "amp": ("amplitude_C", float, ("unstable",)),
    "code": ("code", int, ("error",)),
}


class FaultSpecError(ValueError):
    """A fault spec that cannot be understood; the message says which part and why."""


@dataclass(frozen=True)
class Fault:
    """One fault to inject. Build it with `Fault.parse(spec)` or directly."""

    kind: str
    after: int = 0
    role: str = ""  # "" = the kind's default role
    delay_s: float = 10.0
    rate_C_per_min: float = 0.5
    limit_A: float = 1e-7
    count: int = 1
    code: int = -222
    amplitude_C: float = 3.0

    def __post_init__(self) -> None:
        if self.kind not in DEFAULT_ROLE:
            raise FaultSpecError(
                f"fault kind {self.kind!r} is unknown; use one of {', '.join(KINDS)}")
        if not self.role:
            object.__setattr__(self, "role", DEFAULT_ROLE[self.kind])
        if self.role not in ROLES:
            raise FaultSpecError(
                f"fault {self.kind}: role {self.role!r} is unknown; use one of {', '.join(ROLES)}")
        if self.after < 0:
            raise FaultSpecError(f"fault {self.kind}: after={self.after} must be 0 or more")
        if not self.delay_s > 0:
            raise FaultSpecError(f"fault {self.kind}: delay={self.delay_s} must be positive seconds")
        if not self.limit_A > 0:
            raise FaultSpecError(f"fault {self.kind}: limit={self.limit_A} must be positive amperes")
        if not self.amplitude_C > 0:
            raise FaultSpecError(f"fault {self.kind}: amp={self.amplitude_C} must be positive degC")
        if self.count < 1:
            raise FaultSpecError(f"fault {self.kind}: count={self.count} must be 1 or more")
        if not -499 <= self.code <= -100:
            raise FaultSpecError(
                f"fault {self.kind}: code={self.code} must be a SCPI error code -100 .. -499")

    @classmethod
    def parse(cls, spec: str) -> "Fault":
        """`KIND[:after=N][:role=R][:OPTION=VALUE]...` -> Fault; FaultSpecError if malformed."""
        text = spec.strip()
        if not text:
            raise FaultSpecError("empty fault spec; write KIND[:after=N], e.g. drop:after=40")
        kind, *options = text.split(":")
        kind = kind.strip().lower()
        if kind not in DEFAULT_ROLE:
            raise FaultSpecError(
                f"fault {spec!r}: kind {kind!r} is unknown; use one of {', '.join(KINDS)}")
        values: dict[str, object] = {}
        for option in options:
            name, eq, raw = option.partition("=")
            name = name.strip().lower()
            raw = raw.strip()
            if not eq or not raw:
                raise FaultSpecError(f"fault {spec!r}: option {option!r} must read NAME=VALUE")
            if name not in _OPTIONS:
                raise FaultSpecError(f"fault {spec!r}: option {name!r} is unknown; "
                                     f"options are {', '.join(_OPTIONS)}")
            field_name, kind_type, kinds = _OPTIONS[name]
            if kind not in kinds:
                raise FaultSpecError(f"fault {spec!r}: option {name!r} applies only to "
                                     f"{', '.join(kinds)}")
            try:
                values[field_name] = kind_type(raw.lower() if kind_type is str else raw)
            except ValueError:
                raise FaultSpecError(f"fault {spec!r}: option {name}={raw!r} must be "
                                     f"{'an integer' if kind_type is int else 'a number'}") from None
        try:
            return cls(kind=kind, **values)  # type: ignore[arg-type]
        except FaultSpecError as exc:
            raise FaultSpecError(f"fault {spec!r}: {exc}") from None

    def spec(self) -> str:
        """The spec text that parses back to this fault (for logs and run records)."""
        parts = [self.kind, f"after={self.after}", f"role={self.role}"]
        extra = {"late": f"delay={self.delay_s:g}", "temp-drift": f"rate={self.rate_C_per_min:g}",
                 "current-limit": f"limit={self.limit_A:g}", "overload": f"count={self.count}",
                 "error": f"code={self.code}", "refuse": f"count={self.count}",
                 "unstable": f"amp={self.amplitude_C:g}"}.get(self.kind)
        if extra:
            parts.append(extra)
        return ":".join(parts)

    @property
    def lasting(self) -> bool:
        return self.kind in LASTING_KINDS


@dataclass
class LinkActions:
    """What the transport must do with one message and its reply."""

    drop: bool = False
    swallow: bool = False
    garble: bool = False
    delay_s: float = 0.0


@dataclass
class _Armed:
    fault: Fault
    due_at: int  # fires on the first qualifying message with count >= due_at
    fired: bool = False


class FaultPlan:
    """Counts messages per role and decides when each armed fault acts.

    `effects` maps the kinds that act on the bench (error, overload, current-limit,
    temp-drift, refuse, unstable) to a callable that applies the fault; the transport applies the rest.
    """

    def __init__(self, effects: Mapping[str, Callable[[Fault], None]]):
        self._effects = dict(effects)
        self._counts = {role: 0 for role in ROLES}
        self._armed: list[_Armed] = []
        self._lock = threading.Lock()
        self.fired: list[Fault] = []  # in firing order, for tests and logs

    def arm(self, fault: Fault) -> None:
        with self._lock:
            self._armed.append(_Armed(fault, self._counts[fault.role] + fault.after + 1))

    def count(self, role: str) -> int:
        with self._lock:
            return self._counts[role]

    def pending(self) -> list[Fault]:
        with self._lock:
            return [a.fault for a in self._armed if not a.fired]

    def on_message(self, role: str, is_query: bool) -> LinkActions:
        """Called by the transport for every non-empty message before it is executed."""
        actions = LinkActions()
        to_apply: list[Fault] = []
        with self._lock:
            self._counts[role] += 1
            n = self._counts[role]
            for armed in self._armed:
                fault = armed.fault
                if armed.fired or fault.role != role or n < armed.due_at:
                    continue
                if fault.kind in REPLY_KINDS and not is_query:
                    continue
                armed.fired = True
                self.fired.append(fault)
                if fault.kind == "drop":
                    actions.drop = True
                elif fault.kind == "timeout":
                    actions.swallow = True
                elif fault.kind == "garble":
                    actions.garble = True
                elif fault.kind == "late":
                    actions.delay_s = max(actions.delay_s, fault.delay_s)
                else:
                    to_apply.append(fault)
        for fault in to_apply:
            self._effects[fault.kind](fault)
        return actions


def garble_reply(reply: str) -> str:
    """A reply cut short and corrupted the same way every time (so tests are repeatable)."""
    return reply[: max(1, len(reply) // 2)] + "#~"


__all__ = ["Fault", "FaultPlan", "FaultSpecError", "LinkActions", "KINDS", "ROLES",
           "garble_reply"]
