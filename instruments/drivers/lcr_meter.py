"""LCR meter driver: function, test frequency and level, one reading at the present bias."""

from __future__ import annotations

import math
from dataclasses import dataclass

from .instrument import Instrument
from .setting import Setting

FUNCTIONS = ("CPD", "CSRS", "CSD", "ZTD")   # Cp-D, Cs-Rs, Cs-D, |Z|-theta (ohm, degrees)


@dataclass(frozen=True)
class Reading:
    """One meter reading. On overload both values are NaN: never a number to trust.

    primary is the capacitance in F for every function; secondary is the dissipation
    factor D (CPD, CSD) or the series resistance in ohm (CSRS).
    """

    primary: float
    secondary: float
    function: str
    overload: bool

    @property
    def C_F(self) -> float:
        return self.primary

    @property
    def D(self) -> float:
        return self.secondary if self.function in ("CPD", "CSD") else math.nan

    @property
    def Rs_ohm(self) -> float:
        return self.secondary if self.function == "CSRS" else math.nan


def _parse_pair(reply: str) -> tuple[float, float]:
    parts = reply.strip().split(",")
    if len(parts) != 2:
        raise ValueError(f"expected '<primary>,<secondary>', got {reply!r}")
    return float(parts[0]), float(parts[1])


class LCRMeter(Instrument):
    """An LCR meter reached by any VISA resource string, spelled by its profile."""

    kind = "lcr-meter"
    default_profile = "generic-lcr"
    default_role = "meter"

    function = Setting("Measurement function: CPD (parallel C and D), CSRS (series C and "
                       "series R), CSD (series C and D), ZTD (|Z| in ohm and phase in degrees, for an "
                       "inductive part above resonance).", type="enum", values=FUNCTIONS)
    freq_Hz = Setting("Test signal frequency.", type="float", unit="Hz")
    ac_level_Vrms = Setting("Open-circuit test signal level; the level across the part is "
                            "lower (source resistance), see ac_dut_Vrms.", type="float",
                            unit="Vrms")
    ac_dut_Vrms = Setting("AC level actually across the part at the last measurement: the "
                          "level class-2 capacitance depends on.", type="float", unit="Vrms",
                          read_only=True)

    def measure(self):
        """Trigger one measurement and fetch it (as the profile says: INIT+FETCh? or READ?).

        An overload (SCPI-1999: 9.9E37, or anything at or above the profile's
        overload_above, or not finite) is flagged and returned as NaN.
        """
        func = self._known.get("function")
        if func is None:
            func = self.function
        cmds = self.profile.commands
        if self.profile.options["mode"] == "init-fetch":
            p, s = self.session.query(cmds["fetch"].format(), parse=_parse_pair,
                                      before=(cmds["trigger"].format(),))
        else:
            p, s = self.session.query(cmds["read"].format(), parse=_parse_pair)
        limit = self.profile.options["overload_above"]
        over = any(not math.isfinite(x) or abs(x) >= limit for x in (p, s))
        if over:
            return Reading(math.nan, math.nan, func, True)
        return Reading(p, s, func, False)
