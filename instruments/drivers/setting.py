"""Declarative settings: one class attribute per instrument setting.

The driver declares what a setting means (type, SI unit in its name, docstring); the
instrument's profile supplies the query/set command strings and the limits, so a model with
another range needs a profile, not code. Every value is validated (type, finiteness, range or
membership) before a command is built, and the error queue is read after each set, so that no
field of a plan can slip a ';' or a newline into a command and no refused set goes unnoticed.
"""

from __future__ import annotations

import math
import numbers
from typing import TYPE_CHECKING, Any

from .errors import InvalidValueError

if TYPE_CHECKING:  # pragma: no cover
    from .profile import SettingSpec

# SI units a setting name may end with (the unit suffix convention of the whole project).
UNITS = ("Hz", "V", "Vrms", "A", "C", "s", "ohm", "F", "W", "C_per_s")

_DEFAULT_FLOAT_FORMAT = ".12g"


def check_float(value: Any, lo: float | None, hi: float | None, what: str, unit: str = "") -> float:
    """A finite real number (not bool, not text) within [lo, hi]."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise InvalidValueError(f"{what}: expected a number{' in ' + unit if unit else ''}, "
                                f"got {type(value).__name__} {value!r}")
    v = float(value)
    if not math.isfinite(v):
        raise InvalidValueError(f"{what}: {v!r} is not a finite number")
    if (lo is not None and v < lo) or (hi is not None and v > hi):
        rng = f"{'-inf' if lo is None else format(lo, 'g')} .. {'inf' if hi is None else format(hi, 'g')}"
        u = f" {unit}" if unit else ""
        raise InvalidValueError(f"{what}: {v:g}{u} is outside the allowed range {rng}{u}")
    return v


def check_enum(value: Any, values: tuple[str, ...], what: str) -> str:
    """One of the listed names (case-insensitive); returns the listed spelling."""
    if isinstance(value, str):
        for v in values:
            if value.upper() == v.upper():
                return v
    raise InvalidValueError(f"{what}: {value!r} is not one of {', '.join(values)}")


def check_bool(value: Any, what: str) -> bool:
    """True or False only (0/1 integers are refused: say what you mean)."""
    if isinstance(value, bool) or type(value).__name__ == "bool_":
        return bool(value)
    raise InvalidValueError(f"{what}: expected True or False, got {value!r}")


def check_channel(value: Any, first: int, last: int, what: str) -> int:
    """A channel number: an integer (not bool, not float) within [first, last]."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InvalidValueError(f"{what}: a channel is a whole number {first} .. {last}, "
                                f"got {type(value).__name__} {value!r}")
    n = int(value)
    if not first <= n <= last:
        raise InvalidValueError(f"{what}: channel {n} is outside {first} .. {last}")
    return n


def parse_bool_reply(reply: str) -> bool:
    t = reply.strip().upper()
    if t in ("1", "ON", "+1"):
        return True
    if t in ("0", "OFF", "+0"):
        return False
    raise ValueError(f"not a boolean reply: {reply!r}")


def parse_float_reply(reply: str) -> float:
    v = float(reply.strip())
    if not math.isfinite(v):
        raise ValueError(f"not a finite number: {reply!r}")
    return v


class Setting:
    """A setting (or, with read_only=True, a reading) of an instrument.

    type: "float", "enum" or "bool"; unit: the SI unit the name ends with ("" for enum/bool);
    values: for an enum, the names the driver understands (a profile may offer a subset).
    The owner class must provide ``_get_setting(setting)`` and ``_set_setting(setting, value)``.
    """

    def __init__(self, doc: str, *, type: str, unit: str = "", read_only: bool = False,
                 values: tuple[str, ...] = (), optional: str = ""):
        if type not in ("float", "enum", "bool"):
            raise ValueError(f"Setting type must be float, enum or bool, not {type!r}")
        if type == "float" and unit not in UNITS:
            raise ValueError(f"a float setting needs an SI unit from {UNITS}, got {unit!r}")
        if type != "float" and unit:
            raise ValueError("enum and bool settings carry no unit")
        if (type == "enum") != bool(values):
            raise ValueError("an enum setting lists the values the driver understands")
        self.values = tuple(values)
        self.type = type
        self.unit = unit
        self.read_only = read_only
        self.optional = optional   # the capability this setting belongs to; "" = required
        self.name = ""
        self.__doc__ = doc

    def __set_name__(self, owner: type, name: str) -> None:
        if self.unit and not name.endswith("_" + self.unit):
            raise ValueError(f"{owner.__name__}.{name}: a setting in {self.unit} must be "
                             f"named *_{self.unit}")
        if self.type == "bool" and not name.endswith("_on"):
            raise ValueError(f"{owner.__name__}.{name}: a bool setting is named *_on")
        self.name = name

    def __get__(self, obj: Any, objtype: type | None = None) -> Any:
        if obj is None:
            return self
        return obj._get_setting(self)

    def __set__(self, obj: Any, value: Any) -> None:
        if self.read_only:
            raise AttributeError(f"{self.name} is a reading, it cannot be set")
        obj._set_setting(self, value)

    def __repr__(self) -> str:
        kind = "reading" if self.read_only else "setting"
        return f"<{kind} {self.name} ({self.type}{', ' + self.unit if self.unit else ''})>"

    # -- the three steps of a set and a query, driven by the instrument's profile ----------

    def validate(self, spec: "SettingSpec", value: Any, what: str) -> Any:
        """Check a value against this setting's type and the profile's limits."""
        if self.type == "float":
            return check_float(value, spec.min, spec.max, what, self.unit)
        if self.type == "enum":
            return check_enum(value, spec.values, what)
        return check_bool(value, what)

    def command(self, spec: "SettingSpec", value: Any) -> str:
        """The set command for an already validated value."""
        assert spec.set is not None
        if self.type == "float":
            text = format(value, spec.set.specs["value"] or _DEFAULT_FLOAT_FORMAT)
        elif self.type == "enum":
            text = spec.tokens[value]
        else:
            text = spec.true_token if value else spec.false_token
        return spec.set.fill(value=text)

    def parse(self, spec: "SettingSpec", reply: str) -> Any:
        """Reply -> value; ValueError for a reply that cannot be read (treated as garbled)."""
        if self.type == "float":
            return parse_float_reply(reply)
        if self.type == "enum":
            v = spec.value_from_token(reply)
            if v is None:
                raise ValueError(f"not one of {', '.join(spec.values)}: {reply!r}")
            return v
        t = reply.strip().upper()
        if t == spec.true_token.upper():
            return True
        if t == spec.false_token.upper():
            return False
        return parse_bool_reply(reply)
