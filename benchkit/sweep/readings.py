"""Readings checked before they are believed, the level across the part, and what the meter
can do (its optional capabilities) as the run record states it.

Why: a meter profiled with its reply fields in the wrong order, on the wrong function or on a
wrong range still answers numbers, and a sweep of them fits beautifully. So every point is
compared with what a ceramic capacitor can read: a positive capacitance, a physically
possible dissipation factor, and, at 0 V, the part's nominal value. A reading that cannot be
this part stops the run (bias off) with the likely cause named; one that is merely outside
the part's tolerance is a finding, flagged, not a stop.

Limits [common practice]: class-2 parts have D below about 0.1 at their standard conditions
(detail specifications give 0.025 .. 0.1), class-1 below 0.01; D above 1 is no capacitor at
all. Under DC bias a class-2 part loses capacitance (to 10-20 % of nominal at rated voltage),
never gains much, so above bias 0 V only an upper bound applies.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from instruments.drivers.errors import InstrumentError

D_MAX = 1.0                 # D = 1/Q above 1: not a capacitor reading
D_MIN = -0.01               # a small negative D is meter noise or compensation residue
IMPLAUSIBLE_FACTOR = 2.0    # at 0 V beyond nominal x2 or /2: not this part's reading
OUT_OF_TOLERANCE_FLAG = "C_out_of_tolerance"


LEVEL_FLAG = "level_off_standard"
# IEC 60384-1 clause 4.2.2 (science.md 2): 1.0 +-0.2 Vrms, and 0.5 +-0.1 Vrms above 10 uF
# (class 2): the tolerance is a fifth of the level in both rows.
LEVEL_TOLERANCE_FRACTION = 0.2


class ImplausibleReading(InstrumentError):
    """The meter's readings cannot be the part's: stop before a sweep of nonsense."""

    def __init__(self, message: str):
        super().__init__(message, role="meter")


@dataclass(frozen=True)
class Expected:
    part_id: str
    nominal_C_F: float
    low_F: float            # tolerance limits (IEC 60062 letter)
    high_F: float

    @classmethod
    def of_part(cls, part) -> "Expected":
        lo, hi = part.tolerance_limits_F()
        return cls(part.id, part.nominal_C_F, lo, hi)


def _decade_name(ratio: float) -> str | None:
    """'1e3', '1e-6' ...: a ratio within a factor 2 of a power of 1000 other than 1."""
    k = round(math.log10(ratio) / 3.0) * 3
    if k != 0 and abs(math.log10(ratio) - k) < math.log10(IMPLAUSIBLE_FACTOR):
        return f"1e{k}"
    return None


def check_point(exp: Expected, bias_V: float, C_F: float | None, D: float | None,
                secondary: float | None, function: str, profile: str,
                at_standard: bool = True) -> list[str]:
    """Flags for a believable point; ImplausibleReading for one that cannot be the part.

    secondary: the raw second field (D, or Rs for CSRS) to recognise swapped fields.
    at_standard: the level across the part is known to be the standard one, so that the
    tolerance (which refers to the standard conditions) applies.
    """
    if C_F is None:
        return []
    where = (f"part {exp.part_id} (nominal {exp.nominal_C_F:.4g} F) at {bias_V:g} V read "
             f"C = {C_F:.4g} F" + (f", D = {D:.4g}" if D is not None else ""))
    order = (f"the reply's fields are likely in another order than the meter profile "
             f"'{profile}' says ([measure.reply] fields)")
    if not math.isfinite(C_F) or C_F <= 0:
        raise ImplausibleReading(
            f"{where}: a capacitance is positive; likely cause: the meter measures another "
            f"function than {function} (an inductance or a reactance), or {order}")
    if secondary is not None and math.isfinite(secondary) and secondary > 0:
        swapped = abs(math.log10(secondary / exp.nominal_C_F)) < math.log10(IMPLAUSIBLE_FACTOR)
        if swapped and not exp.low_F / IMPLAUSIBLE_FACTOR <= C_F <= exp.high_F * IMPLAUSIBLE_FACTOR:
            raise ImplausibleReading(
                f"{where}: the second field reads like this part's capacitance; likely cause: "
                f"{order}")
    if D is not None and math.isfinite(D) and not D_MIN <= D <= D_MAX:
        raise ImplausibleReading(
            f"{where}: D = {D:.4g} is not possible for a ceramic capacitor (0 .. {D_MAX:g}); "
            f"likely cause: the second field is another quantity (function {function} "
            f"expected), or {order}")
    ratio = C_F / exp.nominal_C_F
    zero = abs(bias_V) < 1e-9
    too_low = zero and ratio < 1.0 / IMPLAUSIBLE_FACTOR
    too_high = ratio > IMPLAUSIBLE_FACTOR
    if too_low or too_high:
        dec = _decade_name(ratio)
        if dec:
            cause = (f"units or range: the reading is about {dec} times the nominal value; the "
                     "meter may answer in another unit than farad (set units = \"suffix\" or "
                     "check its display unit) or sit on a wrong range")
        else:
            cause = (f"the meter's range or function (set {function}), the channel (another "
                     "sample, or an open fixture), or " + order)
        raise ImplausibleReading(f"{where}: {ratio:.3g} times the nominal value; likely "
                                 f"cause: {cause}")
    if zero and at_standard and not exp.low_F <= C_F <= exp.high_F:
        return [OUT_OF_TOLERANCE_FLAG]
    return []


def level_flags(ac_dut_Vrms: float | None, standard_Vrms: float) -> list[str]:
    """level_off_standard when the level across the part is outside the standard's tolerance."""
    if ac_dut_Vrms is None or not math.isfinite(ac_dut_Vrms):
        return []
    if abs(ac_dut_Vrms - standard_Vrms) > LEVEL_TOLERANCE_FRACTION * standard_Vrms + 1e-12:
        return [LEVEL_FLAG]
    return []


def may_use(drv, capability: str) -> bool:
    """The driver's profile spells this capability and lets the engine use it."""
    return _can(drv, capability, True)


def _can(drv, capability: str, use: bool) -> bool:
    fn = getattr(drv, "may_use" if use else "has", None)
    if fn is None:      # a driver without capabilities (e.g. a test double): the basic meter
        return capability == "level_monitor"
    return bool(fn(capability))


def capability_record(meter, bias_from_meter: bool) -> dict[str, str]:
    """run.json 'meter_capabilities': a word on each optional capability, used or not."""
    out = {}
    words = {
        "level_monitor": ("used: the level across the part is recorded at every point "
                          "(ac_level_dut_Vrms) and checked against the standard level",
                          "not used: the level across the part is not measured; "
                          "ac_level_dut_Vrms stays empty and curves state the set level"),
        "level_control": ("used: the meter holds the set level across the part",
                          "not used: the level across the part is what the source's divider "
                          "leaves; points outside the standard level are flagged "
                          f"{LEVEL_FLAG}"),
        "list_sweep": ("present: the engine measures point by point all the same",
                       "absent"),
    }
    for cap, (yes, no) in words.items():
        if _can(meter, cap, True):
            out[cap] = yes
        elif _can(meter, cap, False):
            out[cap] = "present, withheld by the profile: " + no.split(": ", 1)[-1]
        else:
            out[cap] = no
    if bias_from_meter:
        out["internal_bias"] = "used: the bias source (no supply on this bench)"
        out["bias_monitor"] = ("used: bias readback and current from the meter"
                               if _can(meter, "bias_monitor", True) else
                               "not used: bias_meas_V is the programmed value and the "
                               "current is not measured (no bias_readback or current_limit "
                               "flags)")
    else:
        out["internal_bias"] = ("present, not used: the bench has a supply"
                                if _can(meter, "internal_bias", False) else "absent")
    return out
