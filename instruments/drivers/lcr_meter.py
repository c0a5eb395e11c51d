"""LCR meter driver: function, test frequency and level, one reading at the present bias.

What a meter can do beyond that (an AC-level monitor, automatic level control, an internal
DC bias source, list sweeps) is optional: the profile spells it or not, and the caller asks
`has()` / `may_use()` before relying on it.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from .errors import InstrumentError, InvalidValueError
from .instrument import Instrument
from .profile import ReplyLayout
from .setting import Setting, check_float

FUNCTIONS = ("CPD", "CSRS", "CSD", "ZTD")   # Cp-D, Cs-Rs, Cs-D, |Z|-theta (ohm, degrees)

# SI prefixes a unit suffix may carry (SI brochure, 9th ed., table 7).
_PREFIX = {"": 1.0, "p": 1e-12, "n": 1e-9, "u": 1e-6, "m": 1e-3, "k": 1e3, "M": 1e6}
_NUMBER_UNIT_RE = re.compile(
    r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]*)\s*$")
# the unit each field carries, per function: primary is always a capacitance
_UNITS = {"CPD": ("F", ""), "CSD": ("F", ""), "CSRS": ("F", "OHM"), "ZTD": ("OHM", "DEG")}


@dataclass(frozen=True)
class Reading:
    """One meter reading. On overload or a bad status both values are NaN: never a number
    to trust.

    primary is the capacitance in F for every function; secondary is the dissipation
    factor D (CPD, CSD) or the series resistance in ohm (CSRS). status is the reply's status
    field as sent ("" when the layout has none); status_ok is False for a status the profile
    does not list as good.
    """

    primary: float
    secondary: float
    function: str
    overload: bool
    status: str = ""
    status_ok: bool = True

    @property
    def valid(self) -> bool:
        return not self.overload and self.status_ok

    @property
    def C_F(self) -> float:
        return self.primary

    @property
    def D(self) -> float:
        return self.secondary if self.function in ("CPD", "CSD") else math.nan

    @property
    def Rs_ohm(self) -> float:
        return self.secondary if self.function == "CSRS" else math.nan


class UnitMismatch(InstrumentError):
    """A reply field carries another unit than the function's: the meter measures something
    else than the driver believes (wrong function, or the profile's field order)."""


def split_reply(layout: ReplyLayout, reply: str) -> list[tuple[float, str] | str]:
    """Fields of one reply: (number, unit suffix) for primary/secondary, text for the rest.

    ValueError (an unreadable reply, retried by the session) when the count of fields or a
    number does not fit the layout.
    """
    sep = layout.separator
    text = reply.strip()
    parts = text.split() if sep == " " else [p.strip() for p in text.split(sep)]
    if len(parts) != len(layout.fields):
        raise ValueError(f"expected {len(layout.fields)} field(s) '{layout.picture}' (the "
                         f"profile's [measure.reply]), got {reply!r}")
    out: list = []
    for name, part in zip(layout.fields, parts):
        if name in ("primary", "secondary"):
            m = _NUMBER_UNIT_RE.match(part)
            if not m or (m.group(2) and layout.units == "none"):
                raise ValueError(f"field <{name}> is not a number: {part!r} in {reply!r}")
            out.append((float(m.group(1)), m.group(2)))
        else:
            out.append(part)
    return out


def _scaled(value: float, suffix: str, unit: str, field: str, func: str, reply: str) -> float:
    """Strip an SI-prefixed unit suffix after checking it is the function's unit."""
    if not suffix:
        return value
    for prefix, scale in _PREFIX.items():
        if unit and suffix.upper() == (prefix + unit).upper() and (
                prefix == "" or suffix[0] == prefix):
            return value * scale
    want = f"{unit} (with an SI prefix)" if unit else "no unit"
    raise UnitMismatch(
        f"meter reply {reply!r}: <{field}> carries unit {suffix!r} where function {func} "
        f"gives {want}; the meter measures another function than set, or the profile's "
        "[measure.reply] fields are in another order than the meter's reply")


class LCRMeter(Instrument):
    """An LCR meter reached by any VISA resource string, spelled by its profile."""

    kind = "lcr-meter"
    default_profile = "generic-lcr"
    default_role = "meter"

    function = Setting("Measurement function: CPD (parallel C and D), CSRS (series C and "
                       "series R), CSD (series C and D), ZTD (|Z| in ohm and phase in degrees, for an "
                       "inductive part above resonance).", type="enum", values=FUNCTIONS)
    freq_Hz = Setting("Test signal frequency.", type="float", unit="Hz")
    ac_level_Vrms = Setting("Test signal level: open-circuit, or across the part when level "
                            "control is on; see ac_dut_Vrms.", type="float", unit="Vrms")
    ac_dut_Vrms = Setting("AC level actually across the part at the last measurement: the "
                          "level class-2 capacitance depends on.", type="float", unit="Vrms",
                          read_only=True, optional="level_monitor")
    level_control_on = Setting("Automatic level control: the meter adjusts its source until "
                               "the level across the part is ac_level_Vrms.", type="bool",
                               optional="level_control")
    bias_V = Setting("Internal DC bias voltage. Setting it jumps; MeterBias ramps it.",
                     type="float", unit="V", optional="internal_bias")
    bias_on = Setting("Internal DC bias output state.", type="bool", optional="internal_bias")
    bias_measured_V = Setting("DC bias across the part as the meter measures it.",
                              type="float", unit="V", read_only=True,
                              optional="bias_monitor")
    bias_current_A = Setting("DC bias current as the meter measures it.", type="float",
                             unit="A", read_only=True, optional="bias_monitor")

    def _after_reconnect(self) -> None:
        # As a supply does: re-apply the settings, the bias output state never (a meter that
        # restarted comes back with its bias off, and the sweep must see that, not mask it).
        for name, value in list(self._remembered.items()):
            if name != "bias_on":
                self._apply(type(self).declared_settings()[name], value)

    def _function_now(self) -> str:
        func = self._known.get("function")
        return func if func is not None else self.function

    def _reading(self, fields: list, func: str, reply: str) -> Reading:
        layout = self.profile.reply or ReplyLayout()
        p_unit, s_unit = _UNITS[func]
        values = {}
        status = ""
        for name, f in zip(layout.fields, fields):
            if name == "primary":
                values[name] = _scaled(*f, p_unit, name, func, reply)
            elif name == "secondary":
                values[name] = _scaled(*f, s_unit, name, func, reply)
            elif name == "status":
                status = f
        p, s = values["primary"], values["secondary"]
        limit = self.profile.options["overload_above"]
        over = any(not math.isfinite(x) or abs(x) >= limit for x in (p, s))
        ok = True
        if status:
            tok = status.strip().strip('"').upper()
            if tok in (t.upper() for t in layout.status_overload):
                over = True
            ok = tok in (t.upper() for t in layout.status_ok)
        if over or not ok:
            return Reading(math.nan, math.nan, func, over, status, ok or over)
        return Reading(p, s, func, False, status, True)

    def measure(self) -> Reading:
        """Trigger one measurement and fetch it (as the profile says: INIT+FETCh? or READ?).

        The reply is read by the profile's layout ([measure.reply]). An overload
        (SCPI-1999: 9.9E37, or anything at or above the profile's overload_above, or not
        finite, or a status listed in status_overload) is flagged and returned as NaN; so is
        a status not listed in status_ok. A unit suffix other than the function's raises
        UnitMismatch.
        """
        func = self._function_now()
        cmds = self.profile.commands
        layout = self.profile.reply or ReplyLayout()
        keep: dict[str, str] = {}

        def parse(reply: str):
            keep["reply"] = reply
            return split_reply(layout, reply)

        if self.profile.options["mode"] == "init-fetch":
            fields = self.session.query(cmds["fetch"].format(), parse=parse,
                                        before=(cmds["trigger"].format(),))
        else:
            fields = self.session.query(cmds["read"].format(), parse=parse)
        return self._reading(fields, func, keep["reply"])

    def measure_list(self, axis: str, values: list[float]) -> list[Reading]:
        """A list sweep: load `values` (Hz for 'freq', V for 'bias'), trigger once, fetch all.

        Needs the profile's [list]; each value is checked against the profile's range of
        freq_Hz or bias_V before anything is sent. The reply holds one reply layout per
        point, joined by the layout's separator.
        """
        what = f"{self.role} ({self.resource}): list sweep"
        if not self.has("list_sweep") or axis not in self.profile.options["list_axes"]:
            raise InvalidValueError(f"{what}: the profile spells no list sweep over {axis!r}")
        n_max = self.profile.options["list_max_points"]
        if not 1 <= len(values) <= n_max:
            raise InvalidValueError(f"{what}: 1 .. {n_max} points, got {len(values)}")
        spec = self._spec(type(self).freq_Hz if axis == "freq" else type(self).bias_V)
        unit = "Hz" if axis == "freq" else "V"
        vals = [check_float(v, spec.min, spec.max, f"{what} {axis}", unit) for v in values]
        cmds = self.profile.commands
        cmd = cmds[f"list_{axis}"].fill(values=",".join(format(v, ".12g") for v in vals))
        self.session.write(cmd)
        self.check_errors(after=cmd)
        func = self._function_now()
        layout = self.profile.reply or ReplyLayout()
        width = len(layout.fields)
        keep: dict[str, str] = {}

        def parse(reply: str):
            keep["reply"] = reply
            sep = layout.separator
            parts = reply.strip().split() if sep == " " else reply.strip().split(sep)
            if len(parts) != width * len(vals):
                raise ValueError(f"expected {len(vals)} x '{layout.picture}', got "
                                 f"{len(parts)} field(s)")
            return [split_reply(layout, sep.join(parts[i:i + width]))
                    for i in range(0, len(parts), width)]

        rows = self.session.query(cmds["list_fetch"].format(), parse=parse,
                                  before=(cmds["list_trigger"].format(),))
        return [self._reading(r, func, keep["reply"]) for r in rows]
