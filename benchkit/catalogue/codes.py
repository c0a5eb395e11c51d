"""Marking codes of ceramic capacitors, each table once: EIA-198 temperature-characteristic
codes, IEC 60062 tolerance letters and EIA inch case codes, parsed into numbers a catalogue,
a budget or a decision can use.

Sources: EIA-198 (class-2 three-character codes such as X7R; class-1 C0G, U2J), IEC 60062
(tolerance letters). The RKM value code (4u7, 2n2) lives in `benchkit.units`.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from benchkit.errors import UserError

# --- EIA-198 class 2 -----------------------------------------------------------------------
# First character: lower limit of the temperature range [standard: EIA-198].
CLASS2_LOW_TEMP_C = {"X": -55.0, "Y": -30.0, "Z": 10.0}
# Second character: upper limit of the temperature range [standard: EIA-198].
CLASS2_HIGH_TEMP_C = {"4": 65.0, "5": 85.0, "6": 105.0, "7": 125.0, "8": 150.0, "9": 200.0}
# Third character: largest change of capacitance over that range, relative to 25 degC,
# as (minus_pct, plus_pct) [standard: EIA-198].
CLASS2_CHANGE_PCT = {
    "F": (7.5, 7.5),
    "P": (10.0, 10.0),
    "R": (15.0, 15.0),
    "S": (22.0, 22.0),
    "T": (33.0, 22.0),
    "U": (56.0, 22.0),
    "V": (82.0, 22.0),
}

# --- EIA-198 class 1 -----------------------------------------------------------------------
# Temperature coefficient and its tolerance in ppm/K, over -55..+125 degC, referred to
# 25 degC [standard: EIA-198; the -55..+125 degC range is common practice for these codes].
CLASS1_CODES = {
    "C0G": (0.0, 30.0),
    "U2J": (-750.0, 120.0),
}
CLASS1_RANGE_C = (-55.0, 125.0)
CLASS1_ALIASES = {"COG": "C0G", "NP0": "C0G", "NPO": "C0G"}  # older or misread names of C0G

REFERENCE_TEMP_C = 25.0  # reference temperature of both code families [standard: EIA-198]


@dataclass(frozen=True)
class ClassCode:
    """A temperature characteristic: the range it covers and what it promises there.

    Class 2 promises a band of capacitance change (change_minus_pct, change_plus_pct) over
    the whole range; class 1 promises a temperature coefficient tc_ppm_per_K +- tc_tol_ppm_per_K.
    """

    code: str
    dielectric_class: int
    low_temp_C: float
    high_temp_C: float
    change_minus_pct: float | None = None
    change_plus_pct: float | None = None
    tc_ppm_per_K: float | None = None
    tc_tol_ppm_per_K: float | None = None

    def change_bounds_pct(self, temp_C: float) -> tuple[float, float]:
        """Allowed capacitance change at temp_C relative to 25 degC, as (lowest, highest) in %.

        Class 2 codes bound the change by the same band at every temperature in the range
        (the code says nothing finer); class 1 codes scale with the distance from 25 degC.
        Outside the code's range the code promises nothing: that is bad input here.
        """
        t = float(temp_C)
        if not (self.low_temp_C <= t <= self.high_temp_C):
            raise UserError(
                f"temperature {t:g} degC is outside the range of {self.code} "
                f"({self.low_temp_C:g}..{self.high_temp_C:g} degC): the code promises nothing there"
            )
        if self.dielectric_class == 2:
            return (-float(self.change_minus_pct), float(self.change_plus_pct))
        dt = t - REFERENCE_TEMP_C
        lo_ppm = min((self.tc_ppm_per_K - self.tc_tol_ppm_per_K) * dt,
                     (self.tc_ppm_per_K + self.tc_tol_ppm_per_K) * dt)
        hi_ppm = max((self.tc_ppm_per_K - self.tc_tol_ppm_per_K) * dt,
                     (self.tc_ppm_per_K + self.tc_tol_ppm_per_K) * dt)
        return (lo_ppm * 1e-4, hi_ppm * 1e-4)


def parse_class_code(text: str) -> ClassCode:
    """'X7R' -> ClassCode(-55..125 degC, -15/+15 %); 'C0G' -> 0 +- 30 ppm/K.

    'C0G' is also accepted written with the letter O ('COG'), as it often is on paper, and
    by its older name NP0.
    """
    raw = str(text).strip().upper()
    key = CLASS1_ALIASES.get(raw, raw)
    if key in CLASS1_CODES:
        tc, tol = CLASS1_CODES[key]
        return ClassCode(key, 1, CLASS1_RANGE_C[0], CLASS1_RANGE_C[1],
                         tc_ppm_per_K=tc, tc_tol_ppm_per_K=tol)
    if (len(key) == 3 and key[0] in CLASS2_LOW_TEMP_C and key[1] in CLASS2_HIGH_TEMP_C
            and key[2] in CLASS2_CHANGE_PCT):
        minus, plus = CLASS2_CHANGE_PCT[key[2]]
        return ClassCode(key, 2, CLASS2_LOW_TEMP_C[key[0]], CLASS2_HIGH_TEMP_C[key[1]],
                         change_minus_pct=minus, change_plus_pct=plus)
    raise UserError(
        f"unknown temperature characteristic code {text!r}: write an EIA-198 class-2 code "
        f"(low-temperature letter {'/'.join(CLASS2_LOW_TEMP_C)}, high-temperature digit "
        f"{'/'.join(CLASS2_HIGH_TEMP_C)}, change letter {'/'.join(CLASS2_CHANGE_PCT)}, e.g. X7R) "
        f"or a class-1 code ({', '.join(CLASS1_CODES)})"
    )


def dielectric_class(class_code: str) -> int:
    """1 or 2 from an EIA-198 temperature-characteristic code (C0G -> 1, X7R -> 2)."""
    try:
        return parse_class_code(class_code).dielectric_class
    except UserError:
        raise UserError(
            f"class code {class_code!r} is not an EIA-198 class-1 (e.g. C0G) or class-2 "
            "(e.g. X7R) code; correct 'class_code' in the parts file"
        ) from None


def format_class_code(low_temp_C: float, high_temp_C: float,
                      change_minus_pct: float, change_plus_pct: float) -> str:
    """The class-2 code for a range and change band, e.g. (-55, 125, 15, 15) -> 'X7R'."""
    def find(table, value, what):
        for key, entry in table.items():
            if entry == value:
                return key
        raise UserError(f"no EIA-198 class-2 character for {what} {value}")
    return (find(CLASS2_LOW_TEMP_C, float(low_temp_C), "low temperature (degC)")
            + find(CLASS2_HIGH_TEMP_C, float(high_temp_C), "high temperature (degC)")
            + find(CLASS2_CHANGE_PCT, (float(change_minus_pct), float(change_plus_pct)),
                   "change band (minus %, plus %)"))


# --- EIA case codes -----------------------------------------------------------------------
# EIA inch case codes accepted in the catalogue [common practice: EIA-198 size codes].
CASE_CODES = ("01005", "0201", "0402", "0603", "0805", "1206", "1210", "1808", "1812",
              "2220", "2225")

# --- IEC 60062 tolerance letters -----------------------------------------------------------
# letter -> (kind, minus, plus); kind "pct" relative to nominal, "pF" absolute.
# [standard: IEC 60062] for B, C, D (absolute, for small values), F, G, J, K, M, Z;
# H, N, Q, S are also IEC 60062 letters [from memory].
TOLERANCE_LETTERS = {
    "B": ("pF", 0.1, 0.1),
    "C": ("pF", 0.25, 0.25),
    "D": ("pF", 0.5, 0.5),
    "F": ("pct", 1.0, 1.0),
    "G": ("pct", 2.0, 2.0),
    "H": ("pct", 3.0, 3.0),
    "J": ("pct", 5.0, 5.0),
    "K": ("pct", 10.0, 10.0),
    "M": ("pct", 20.0, 20.0),
    "N": ("pct", 30.0, 30.0),
    "Q": ("pct", 10.0, 30.0),
    "S": ("pct", 20.0, 50.0),
    "Z": ("pct", 20.0, 80.0),
}


ABSOLUTE_TOLERANCE_MAX_C_F = 10e-12  # B/C/D are for values below 10 pF [standard: IEC 60062]


@dataclass(frozen=True)
class Tolerance:
    """A tolerance band around a reference value: minus and plus, in % or in pF."""

    minus: float
    plus: float
    kind: str = "pct"  # "pct" (relative) or "pF" (absolute)
    letter: str | None = None

    def limits(self, reference_F: float) -> tuple[float, float]:
        """Lower and upper limit in farads around reference_F."""
        ref = float(reference_F)
        if self.kind == "pF":
            return (ref - self.minus * 1e-12, ref + self.plus * 1e-12)
        return (ref * (1.0 - self.minus / 100.0), ref * (1.0 + self.plus / 100.0))

    def relative_limits(self, reference_F: float) -> tuple[float, float]:
        """The same band as factors of reference_F (e.g. 0.9, 1.1)."""
        lo, hi = self.limits(reference_F)
        return (lo / reference_F, hi / reference_F)

    def text(self) -> str:
        unit = " pF" if self.kind == "pF" else " %"
        band = (f"+-{self.plus:g}{unit}" if self.minus == self.plus
                else f"+{self.plus:g}/-{self.minus:g}{unit}")
        return f"{self.letter} ({band})" if self.letter else band


_PCT_SYM = re.compile(r"^(?:\+-|\u00b1|\+/-)?\s*([0-9]*\.?[0-9]+)\s*(%|pF)$", re.IGNORECASE)
_PCT_ASYM = re.compile(r"^\+\s*([0-9]*\.?[0-9]+)\s*(%|pF)?\s*/\s*-\s*([0-9]*\.?[0-9]+)\s*(%|pF)$",
                       re.IGNORECASE)


def parse_tolerance(text: str) -> Tolerance:
    """'K', '10%', '+-10 %', '+80/-20%', '0.25pF' -> Tolerance. Letters per IEC 60062."""
    raw = str(text).strip()
    up = raw.upper()
    if up in TOLERANCE_LETTERS:
        kind, minus, plus = TOLERANCE_LETTERS[up]
        return Tolerance(minus, plus, kind, up)
    compact = raw.replace(" ", "")
    m = _PCT_SYM.match(compact)
    if m:
        value = float(m.group(1))
        kind = "pF" if m.group(2).lower() == "pf" else "pct"
        return _checked(Tolerance(value, value, kind), raw)
    m = _PCT_ASYM.match(compact)
    if m:
        unit_plus, unit_minus = (m.group(2) or m.group(4)).lower(), m.group(4).lower()
        if unit_plus != unit_minus:
            raise UserError(f"tolerance {raw!r}: plus and minus parts must use the same unit")
        kind = "pF" if unit_minus == "pf" else "pct"
        return _checked(Tolerance(float(m.group(3)), float(m.group(1)), kind), raw)
    raise UserError(
        f"tolerance {raw!r} not understood: write an IEC 60062 letter "
        f"({', '.join(TOLERANCE_LETTERS)}), a band like '10%' or '+80/-20%', or '0.25pF'"
    )


def _checked(tol: Tolerance, raw: str) -> Tolerance:
    if not (math.isfinite(tol.minus) and math.isfinite(tol.plus)) or tol.minus < 0 or tol.plus < 0:
        raise UserError(f"tolerance {raw!r}: band must be finite and not negative")
    if tol.kind == "pct" and tol.minus >= 100.0:
        raise UserError(f"tolerance {raw!r}: a minus band of 100 % or more allows zero capacitance")
    return tol


def tolerance_letter_for(minus: float, plus: float, kind: str = "pct") -> str | None:
    """The IEC 60062 letter of a band, or None when it has none."""
    for letter, (k, mi, pl) in TOLERANCE_LETTERS.items():
        if k == kind and mi == float(minus) and pl == float(plus):
            return letter
    return None


def tolerance_limits_F(nominal_C_F: float, letter: str) -> tuple[float, float]:
    """(lowest, highest) C for a tolerance letter [standard: IEC 60062]; ValueError if unknown."""
    if letter not in TOLERANCE_LETTERS:
        raise ValueError(f"unknown tolerance letter {letter!r}")
    return parse_tolerance(letter).limits(nominal_C_F)
