"""A small SCPI message parser and dispatcher for the simulated instruments.

Why its own: the simulated bench must answer exactly the command sets of
instruments/COMMANDS.md, including the awkward parts a driver meets on real hardware
(short/long mnemonics, optional nodes, compound messages, MIN/MAX, the error queue and the
event status register), so the drivers are tested against the protocol and not against a
mock of their own assumptions.

Rules followed (SCPI-1999 vol. 1 and IEEE 488.2-1992):
- a header is `NODE:NODE...` (a leading ':' is allowed), each node in its short form (the
  upper-case letters of the mnemonic) or its long form, case-insensitive; `[NODE]` is optional;
- a message holds program message units separated by ';'; a unit without a leading ':'
  is first tried relative to the path of the unit before it, then from the root;
  common commands (`*XXX`) do not change that path;
- the answers of several queries in one message are joined by ';' into one line;
- the first error in a message ends the message (the rest is not executed);
- the error queue holds 16 entries; when full, the newest entry becomes -350 and further
  errors are lost until it is read (SCPI-1999 vol. 2, 21.8);
- every error sets its class bit in the event status register (IEEE 488.2 11.5.1).
"""

from __future__ import annotations

import collections
import re
import threading
from dataclasses import dataclass
from typing import Callable, Sequence

# Texts of the error codes this bench raises (SCPI-1999 vol. 2, 21.8).
ERROR_TEXT = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -300: "Device-specific error",
    -350: "Queue overflow",
    -410: "Query INTERRUPTED",
    -420: "Query UNTERMINATED",
}

ERROR_QUEUE_SIZE = 16
# Generic texts of the error classes, for codes without their own entry above.
_CLASS_TEXT = {1: "Command error", 2: "Execution error", 3: "Device-specific error",
               4: "Query error"}

# Event status register bits (IEEE 488.2 11.5.1.1).
ESR_OPC = 1
ESR_QUERY_ERROR = 4
ESR_DEVICE_ERROR = 8
ESR_EXECUTION_ERROR = 16
ESR_COMMAND_ERROR = 32


class ScpiError(Exception):
    """An error that ends up in the instrument's error queue, not in the server's log."""

    def __init__(self, code: int, detail: str = ""):
        if code not in ERROR_TEXT:
            raise ValueError(f"SCPI error code {code} is not one this bench knows")
        super().__init__(f"{code},{ERROR_TEXT[code]}" + (f"; {detail}" if detail else ""))
        self.code = code
        self.detail = detail


def esr_bit_for(code: int) -> int:
    """The ESR class bit an error code sets (IEEE 488.2 11.5.1; SCPI-1999 vol. 2, 21.8)."""
    if -199 <= code <= -100:
        return ESR_COMMAND_ERROR
    if -299 <= code <= -200:
        return ESR_EXECUTION_ERROR
    if -399 <= code <= -300:
        return ESR_DEVICE_ERROR
    if -499 <= code <= -400:
        return ESR_QUERY_ERROR
    return 0


class ErrorQueue:
    """The SCPI error/event queue plus the event status register, shared by all clients."""

    def __init__(self, size: int = ERROR_QUEUE_SIZE):
        self._size = size
        self._queue: collections.deque[tuple[int, str]] = collections.deque()
        self._esr = 0
        self._lock = threading.Lock()

    def push(self, code: int, detail: str = "") -> None:
        text = ERROR_TEXT.get(code) or _CLASS_TEXT.get(-code // 100, "Device-specific error")
        if detail:
            text = f"{text}; {detail}"
        text = text.replace('"', "'")
        with self._lock:
            self._esr |= esr_bit_for(code)
            if len(self._queue) < self._size:
                self._queue.append((code, text))
            elif self._queue[-1][0] != -350:
                # Full: the newest entry becomes the overflow marker (SCPI-1999 vol. 2, 21.8.1).
                self._queue[-1] = (-350, ERROR_TEXT[-350])
                self._esr |= esr_bit_for(-350)

    def pop(self) -> tuple[int, str]:
        with self._lock:
            if self._queue:
                return self._queue.popleft()
            return 0, ERROR_TEXT[0]

    def clear(self) -> None:
        """*CLS: the queue and the event status register (IEEE 488.2 10.3)."""
        with self._lock:
            self._queue.clear()
            self._esr = 0

    def set_esr_bits(self, bits: int) -> None:
        with self._lock:
            self._esr |= bits

    def read_esr(self) -> int:
        """*ESR?: the register, then cleared (IEEE 488.2 10.12)."""
        with self._lock:
            value, self._esr = self._esr, 0
            return value

    def __len__(self) -> int:
        with self._lock:
            return len(self._queue)

    def entries(self) -> list[tuple[int, str]]:
        with self._lock:
            return list(self._queue)


# ---------------------------------------------------------------- parameter parsing

_NUMBER = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$")
_KEYWORDS = {"MIN": "MIN", "MINIMUM": "MIN", "MAX": "MAX", "MAXIMUM": "MAX", "DEF": "DEF",
             "DEFAULT": "DEF"}


def parse_number(token: str, lo: float, hi: float, default: float | None = None,
                 what: str = "value") -> float:
    """Decimal numeric program data, or MIN/MAX/DEF, checked against [lo, hi] (SCPI-1999 7.2)."""
    keyword = _KEYWORDS.get(token.upper())
    if keyword == "MIN":
        return lo
    if keyword == "MAX":
        return hi
    if keyword == "DEF":
        if default is None:
            raise ScpiError(-224, f"{what} has no default")
        return default
    if not _NUMBER.match(token):
        raise ScpiError(-104, f"{what} must be a number, got {token[:40]!r}")
    value = float(token)
    if not lo <= value <= hi:
        raise ScpiError(-222, f"{what} {token} outside {lo:g} .. {hi:g}")
    return value


def parse_bool(token: str, what: str = "state") -> bool:
    """ON|OFF, or a number rounded to an integer where non-zero means ON (SCPI-1999 7.3)."""
    word = token.upper()
    if word == "ON":
        return True
    if word == "OFF":
        return False
    if _NUMBER.match(token):
        return round(float(token)) != 0
    raise ScpiError(-224, f"{what} must be ON, OFF, 1 or 0, got {token[:40]!r}")


def parse_choice(token: str, choices: Sequence[str], what: str = "value") -> str:
    """Character program data from a fixed set, case-insensitive; answered in upper case."""
    word = token.upper()
    for choice in choices:
        if word == choice.upper():
            return choice
    raise ScpiError(-224, f"{what} must be one of {', '.join(choices)}, got {token[:40]!r}")


_CHANNEL_LIST = re.compile(r"^\(@\s*([0-9:,\s]+)\)$")


def parse_channel_list(token: str, lo: int = 1, hi: int = 16) -> list[int]:
    """A channel list `(@1)`, `(@1,3)`, `(@2:5)` or mixed; ranges may run down (SCPI-1999 8.3.2)."""
    match = _CHANNEL_LIST.match(token.strip())
    if not match:
        raise ScpiError(-104, f"expected a channel list like (@1,2:4), got {token[:40]!r}")
    channels: list[int] = []
    for item in match.group(1).split(","):
        item = item.strip()
        parts = [p.strip() for p in item.split(":")]
        if len(parts) > 2 or not all(p.isdigit() for p in parts):
            raise ScpiError(-104, f"bad channel list entry {item!r}")
        first, last = int(parts[0]), int(parts[-1])
        step = 1 if last >= first else -1
        for ch in range(first, last + step, step):
            if not lo <= ch <= hi:
                raise ScpiError(-222, f"channel {ch} outside {lo} .. {hi}")
            channels.append(ch)
    return channels


def format_float(value: float) -> str:
    """Floats answered in scientific notation with 9 decimals (COMMANDS.md)."""
    return f"{value:.9E}"


def format_bool(value: bool) -> str:
    return "1" if value else "0"


# ---------------------------------------------------------------- header matching

_PATTERN_NODE = re.compile(r"\[:?([A-Za-z*]+):?\]|:?([A-Za-z*]+)")


@dataclass(frozen=True)
class _Node:
    short: str
    long: str
    optional: bool

    def matches(self, token: str) -> bool:
        word = token.upper()
        return word == self.short or word == self.long


def _parse_pattern(pattern: str) -> tuple[_Node, ...]:
    nodes = []
    pos = 0
    text = pattern.rstrip("?")
    while pos < len(text):
        match = _PATTERN_NODE.match(text, pos)
        if not match or match.end() == pos:
            raise ValueError(f"bad SCPI header pattern {pattern!r} at {pos}")
        name = match.group(1) or match.group(2)
        optional = match.group(1) is not None
        short = "".join(ch for ch in name if ch.isupper() or ch == "*" or ch.isdigit())
        nodes.append(_Node(short=short.upper(), long=name.upper(), optional=optional))
        pos = match.end()
    return tuple(nodes)


def _match_nodes(nodes: tuple[_Node, ...], tokens: list[str]) -> bool:
    """Whether the typed tokens spell the pattern, skipping optional nodes where needed."""

    def walk(i: int, j: int) -> bool:
        if j == len(nodes):
            return i == len(tokens)
        node = nodes[j]
        if i < len(tokens) and node.matches(tokens[i]) and walk(i + 1, j + 1):
            return True
        return node.optional and walk(i, j + 1)

    return walk(0, 0)


Handler = Callable[[list[str]], "str | None"]


@dataclass
class _Command:
    pattern: str
    nodes: tuple[_Node, ...]
    set_handler: Handler | None
    query_handler: Handler | None
    set_args: tuple[int, int]
    query_args: tuple[int, int]


_HEADER_CHARS = re.compile(r"^[A-Za-z0-9:*?_]+$")
# Printable ASCII and tab only: anything else is garbage on the line (IEEE 488.2 7.4).
_BAD_CHARS = re.compile(r"[^\t\x20-\x7e]")


def split_outside(text: str, sep: str) -> list[str]:
    """Split on `sep` outside double/single quotes and parentheses (IEEE 488.2 7.3)."""
    pieces, current, quote, depth = [], [], None, 0
    for ch in text:
        if quote:
            current.append(ch)
            if ch == quote:
                quote = None
            continue
        if ch in "\"'":
            quote = ch
        elif ch == "(":
            depth += 1
        elif ch == ")":
            depth = max(0, depth - 1)
        elif ch == sep and depth == 0:
            pieces.append("".join(current))
            current = []
            continue
        current.append(ch)
    if quote:
        raise ScpiError(-102, "unterminated string")
    pieces.append("".join(current))
    return pieces


class CommandSet:
    """The headers one instrument understands and the handlers behind them."""

    def __init__(self) -> None:
        self._commands: list[_Command] = []

    def add(self, pattern: str, set: Handler | None = None, query: Handler | None = None,
            set_args: tuple[int, int] = (1, 1), query_args: tuple[int, int] = (0, 0)) -> None:
        """Register `pattern` (e.g. "[SOURce:]VOLTage[:LEVel]") with its set and/or query form."""
        self._commands.append(_Command(pattern, _parse_pattern(pattern), set, query,
                                       set_args, query_args))

    def _lookup(self, tokens: list[str]) -> _Command | None:
        for command in self._commands:
            if _match_nodes(command.nodes, tokens):
                return command
        return None

    def execute(self, message: str, errors: ErrorQueue) -> str | None:
        """Run one message (a line without its terminator); the reply line or None.

        Errors go to `errors`; the message stops at the first one.
        """
        replies: list[str] = []
        path: list[str] = []
        bad = _BAD_CHARS.search(message)
        if bad:
            errors.push(-102, f"character {bad.group()!r} not allowed in a program message")
            return None
        try:
            units = split_outside(message, ";")
        except ScpiError as exc:
            errors.push(exc.code, exc.detail)
            return None
        for unit in units:
            unit = unit.strip()
            if not unit:
                continue
            try:
                reply, path = self._execute_unit(unit, path)
            except ScpiError as exc:
                errors.push(exc.code, exc.detail)
                break
            if reply is not None:
                replies.append(reply)
        return ";".join(replies) if replies else None

    def _execute_unit(self, unit: str, path: list[str]) -> tuple[str | None, list[str]]:
        head, _, rest = unit.replace("\t", " ").partition(" ")
        if not _HEADER_CHARS.match(head):
            raise ScpiError(-102, f"bad character in header {head[:40]!r}")
        is_query = head.endswith("?")
        bare = head[:-1] if is_query else head
        if "?" in bare or not bare or bare.endswith(":") or "::" in bare:
            raise ScpiError(-102, f"malformed header {head[:40]!r}")
        common = bare.startswith("*")
        absolute = bare.startswith(":")
        tokens = bare.lstrip(":").split(":")
        command = None
        if not common and not absolute and path:
            command = self._lookup(path + tokens)
            if command is not None:
                tokens = path + tokens
        if command is None:
            command = self._lookup(tokens)
        if command is None:
            raise ScpiError(-113, head[:40])
        handler = command.query_handler if is_query else command.set_handler
        if handler is None:
            raise ScpiError(-113, f"{head[:40]} has no {'query' if is_query else 'set'} form")
        rest = rest.strip()
        args = [a.strip() for a in split_outside(rest, ",")] if rest else []
        if any(not a for a in args):
            raise ScpiError(-102, "empty parameter")
        lo, hi = command.query_args if is_query else command.set_args
        if len(args) < lo:
            raise ScpiError(-109, head[:40])
        if len(args) > hi:
            raise ScpiError(-108, f"{head[:40]} takes {hi} parameter(s)")
        reply = handler(args)
        new_path = path if common else tokens[:-1]
        return (reply if is_query else None), new_path


class ScpiInstrument:
    """One simulated instrument: its parser, error queue and the IEEE 488.2 common commands.

    Subclasses register their own headers in `_register()` and restore reset values in
    `reset()`. `handle()` is serialised by the instrument's own lock, as a real instrument
    has one parser however many clients talk to it.
    """

    maker = "benchkit-sim"
    model = "SIM-GENERIC"
    firmware = "1.0"
    role = "instrument"

    def __init__(self, serial: str):
        self.serial = serial
        self.errors = ErrorQueue()
        self.commands = CommandSet()
        self._lock = threading.Lock()
        self._register_common()
        self._register()
        self.reset()

    # -- for subclasses
    def _register(self) -> None:
        """Add the instrument's own headers."""

    def reset(self) -> None:
        """*RST: reset values (IEEE 488.2 10.32); the error queue is left alone."""

    # -- the transport calls this
    def handle(self, message: str) -> str | None:
        """Execute one message; return the reply line (without terminator) or None."""
        with self._lock:
            return self.commands.execute(message, self.errors)

    @property
    def idn(self) -> str:
        return f"{self.maker},{self.model},{self.serial},{self.firmware}"

    def add_number(self, pattern: str, get: Callable[[], float], set: Callable[[float], None],
                   lo: float, hi: float, default: float, what: str) -> None:
        """A numeric setting with MIN/MAX/DEF in both its set and its query form (SCPI-1999 7.2.1)."""

        def do_set(args: list[str]) -> None:
            set(parse_number(args[0], lo, hi, default=default, what=what))

        def do_query(args: list[str]) -> str:
            if args:
                keyword = _KEYWORDS.get(args[0].upper())
                if keyword is None:
                    raise ScpiError(-224, f"query of {what} takes MIN, MAX or DEF")
                return format_float({"MIN": lo, "MAX": hi, "DEF": default}[keyword])
            return format_float(get())

        self.commands.add(pattern, set=do_set, query=do_query, set_args=(1, 1), query_args=(0, 1))

    def _register_common(self) -> None:
        add = self.commands.add
        add("*IDN", query=lambda a: self.idn)
        add("*RST", set=lambda a: self.reset(), set_args=(0, 0))
        add("*CLS", set=lambda a: self.errors.clear(), set_args=(0, 0))
        add("*OPC", set=lambda a: self.errors.set_esr_bits(ESR_OPC), query=lambda a: "1",
            set_args=(0, 0))
        add("*ESR", query=lambda a: str(self.errors.read_esr()))
        add("*WAI", set=lambda a: None, set_args=(0, 0))
        add("*TST", query=lambda a: "0")
        add("SYSTem:ERRor[:NEXT]", query=self._query_error)

    def _query_error(self, args: list[str]) -> str:
        code, text = self.errors.pop()
        return f'{code},"{text}"'
