"""Engineering values in and out, written the way the trade writes them.

Accepted input (one value, optional sign, optional unit symbol at the end):
  plain numbers        2.2e-6, 100, -0.5
  SI prefixes          4.7u, 100n, 10uF, 2.2 kohm, 1.5 MHz   (engineering prefixes a f p n u m k M G T P E;
                       `u`, `µ` (U+00B5) and `μ` (U+03BC) all mean micro; case matters: m milli, M mega)
  unit symbols         read in the case people type where no prefix looks alike: 12v, 1khz, 4.7uf, 85C (degC)
  IEC 60062 RKM code   4u7 = 4.7u, 2n2, p47, 4F7; for resistance 4R7 = 4.7, R47 = 0.47, 1k5 / 1K5 = 1500, 4M7
                       (the letter stands for the decimal point and carries the multiplier)

The hecto/deca/deci/centi prefixes are refused on purpose: they are not used for component
values, and "d" or "c" after a number is far more likely a typo. The 2022 prefixes R/Q (ronna,
quetta) are refused too, since "R" is the RKM decimal marker for ohms.

Bad input raises `benchkit.errors.UserError` with one line naming the field and showing the
accepted forms, so the CLI exits 2 without a traceback.
"""

from __future__ import annotations

import argparse
import math
import re

from benchkit.errors import UserError

# Engineering (power-of-1000) SI prefixes [standard: SI Brochure, 9th ed., BIPM, table 7].
SI_PREFIXES: dict[str, int] = {
    "a": -18,
    "f": -15,
    "p": -12,
    "n": -9,
    "u": -6,
    "\u00b5": -6,  # MICRO SIGN
    "\u03bc": -6,  # GREEK SMALL LETTER MU
    "m": -3,
    "": 0,
    "k": 3,
    "M": 6,
    "G": 9,
    "T": 12,
    "P": 15,
    "E": 18,
}

# IEC 60062 RKM letters. Capacitance: p n u m F; resistance: R K M G T (K written k too,
# common practice). The letter is the decimal marker and the multiplier at once.
RKM_LETTERS: dict[str, int] = {
    "p": -12,
    "n": -9,
    "u": -6,
    "\u00b5": -6,
    "\u03bc": -6,
    "m": -3,
    "F": 0,
    "R": 0,
    "K": 3,
    "k": 3,
    "M": 6,
    "G": 9,
    "T": 12,
}

# Unit symbols a value may end with, by quantity. "ohm" has ASCII spellings as well.
UNIT_SYMBOLS: dict[str, tuple[str, ...]] = {
    "F": ("F",),
    "ohm": ("ohms", "ohm", "Ohm", "\u03a9", "\u2126"),
    "V": ("V",),
    "A": ("A",),
    "Hz": ("Hz",),
    "Vrms": ("Vrms", "V"),
    "s": ("s",),
    "degC": ("degC", "\u00b0C", "\u2103", "C"),
}

# Symbols also read in lower or upper case as people type them (12v, 1khz, 0.5vrms): no prefix
# is spelt like these. "F" is read as "f" only after a prefix (4.7uf), since "10f" is femto.
_CASE_FREE = {"V": ("V",), "Vrms": ("Vrms", "V"), "Hz": ("Hz",), "degC": ("degC",)}

# Largest capacitance a ceramic capacitor is made with: about a millifarad, the biggest MLCCs
# being some hundreds of microfarads [common practice, from memory]. Beyond 10 mF a value is
# far more likely a forgotten prefix (4.7 for 4.7u) than a part.
CERAMIC_MAX_F = 10e-3

EXAMPLES = "e.g. 4.7u, 4u7, 10uF, 100n, 2.2e-6, 1k5"

_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")
_RKM = re.compile(r"([+-]?)(\d*)([pnu\u00b5\u03bcmFRKkMGT])(\d*)")


def _strip_unit(text: str, unit: str | None) -> str:
    """Drop a trailing unit symbol (10uF -> 10u, 12v -> 12, 85C -> 85) when it is the expected unit."""
    if unit is None:
        return text
    folded = text.lower()
    for symbol in sorted(UNIT_SYMBOLS.get(unit, (unit,)), key=len, reverse=True):
        exact = text.endswith(symbol)
        loose = symbol in _CASE_FREE.get(unit, ()) and folded.endswith(symbol.lower())
        if (exact or loose) and len(text) > len(symbol):
            head = text[: -len(symbol)].rstrip()
            if unit == "degC":  # a temperature takes no prefix: 85C, -40degC, 25.5 °C
                if head and (head[-1].isdigit() or head[-1] == "."):
                    return head
                continue
            # "4F7" is an RKM capacitance, not "4" + F + "7": only strip a final symbol.
            if head and (head[-1].isdigit() or head[-1] in SI_PREFIXES or head[-1] == "."):
                return head
    if unit == "F" and text.endswith("f") and len(text) > 2 and text[-2] in SI_PREFIXES \
            and not text[-2].isdigit():
        return text[:-1]  # 4.7uf, 100nf: a prefix, then the farad in lower case
    return text


def parse_value(text: str | float | int, unit: str | None = None, field: str = "value") -> float:
    """Read one engineering value; `unit` ('F', 'ohm', 'V', 'Hz', ...) allows that symbol at the end.

    Why one parser: the operator types what the datasheet or the drawing says (4u7, 10uF, 1k5),
    and every command should understand it the same way.
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value = float(text)
        if not math.isfinite(value):
            raise UserError(f"{field} {text!r}: not a finite number; write {EXAMPLES}")
        return value
    if not isinstance(text, str):
        raise UserError(f"{field} {text!r}: expected a number as text, {EXAMPLES}")
    raw = text
    s = text.strip().replace(" ", "")
    if not s:
        raise UserError(f"{field}: empty value; write {EXAMPLES}")
    if "," in s:
        raise UserError(
            f"{field} {raw!r}: a comma is not a decimal marker here; write {s.replace(',', '.')} "
            f"or the RKM form (4u7)"
        )
    s = _strip_unit(s, unit)
    # 1) a plain number, 2) number + SI prefix, 3) IEC 60062 RKM code.
    m = _NUMBER.fullmatch(s)
    if m:
        return _finite(float(s), raw, field)
    m = _NUMBER.match(s)
    if m and s[m.end():] in SI_PREFIXES and "e" not in m.group(0).lower():
        # Decimal text -> float in one rounding (10uF is exactly float('10e-6'), not 10*1e-6).
        return _finite(float(f"{m.group(0)}e{SI_PREFIXES[s[m.end():]]}"), raw, field)
    r = _RKM.fullmatch(s)
    if r and (r.group(2) or r.group(4)):
        sign, whole, letter, frac = r.groups()
        if unit == "F" and letter in "RKkGT":
            raise UserError(f"{field} {raw!r}: {letter!r} is an RKM resistance letter, "
                            f"not a capacitance one (p n u m F)")
        if unit == "ohm" and letter in "pnu\u00b5\u03bcF":
            raise UserError(f"{field} {raw!r}: {letter!r} is an RKM capacitance letter, "
                            f"not a resistance one (R K M G T)")
        value = float(f"{sign}{whole or '0'}.{frac or '0'}e{RKM_LETTERS[letter]}")
        return _finite(value, raw, field)
    unit_hint = f" in {unit}" if unit else ""
    raise UserError(f"{field} {raw!r}: not an engineering value{unit_hint}; write {EXAMPLES}")


def _finite(value: float, raw: str, field: str) -> float:
    if not math.isfinite(value):
        raise UserError(f"{field} {raw!r}: not a finite number; write {EXAMPLES}")
    return value


def parse_count(text: str | int, field: str = "value") -> int:
    """A whole number of items, engineering forms allowed: 2000, 10k, 1.5k (lot sizes)."""
    if isinstance(text, int) and not isinstance(text, bool):
        value = float(text)
    else:
        try:
            value = parse_value(text, None, field)
        except UserError:
            raise UserError(f"{field} {text!r}: not a whole number; write e.g. 2000, 10k, 1.5k") from None
    if value != math.floor(value) or value < 0:
        raise UserError(f"{field} {text!r}: must be a whole number >= 0 (e.g. 2000, 10k)")
    return int(value)


def check_ceramic_capacitance(value_F: float, field: str) -> float:
    """Refuse a capacitance no ceramic capacitor has: most often a forgotten prefix (--min 4.7)."""
    if value_F > CERAMIC_MAX_F:
        guess = format_value(value_F * 1e-6, "", micro="u").replace(" ", "")
        raise UserError(f"{field} {format_value(value_F, 'F')}: far more than any ceramic capacitor "
                        f"holds (about 1 mF at most); is a prefix missing? write {guess} for "
                        f"{format_value(value_F * 1e-6, 'F')}")
    return value_F


def arg_type(unit: str | None, field: str = "value", ceramic: bool = False):
    """An argparse `type=` that reads engineering values and reports errors in one line.

    unit 'count' reads a whole number (10k); `ceramic` refuses capacitances no MLCC has.
    """

    def convert(text: str) -> float:
        try:
            if unit == "count":
                return parse_count(text, field)
            value = parse_value(text, unit, field)
            return check_ceramic_capacitance(value, field) if ceramic else value
        except UserError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None

    convert.__name__ = f"{unit or 'number'} value"
    return convert


_FORMAT_PREFIXES = [("a", -18), ("f", -15), ("p", -12), ("n", -9), ("u", -6), ("m", -3), ("", 0),
                    ("k", 3), ("M", 6), ("G", 9), ("T", 12), ("P", 15), ("E", 18)]


def format_value(value: float, unit: str = "", digits: int = 4, micro: str = "u") -> str:
    """Engineering form for people: 4.7e-6 F -> '4.7 uF', 1500 ohm -> '1.5 kohm'.

    `digits` significant digits, trailing zeros dropped; `micro` may be set to 'µ'.
    """
    v = float(value)
    if not math.isfinite(v):
        return f"{v} {unit}".rstrip()
    if v == 0.0:
        return f"0 {unit}".rstrip()
    # Round first, so 999.99e-9 with 4 digits becomes 1 u, not 1000 n.
    exp10 = math.floor(math.log10(abs(v)))
    rounded = round(v, -exp10 + digits - 1)
    exp3 = int(math.floor(math.log10(abs(rounded)) / 3) * 3) if rounded else 0
    exp3 = max(-18, min(18, exp3))
    prefix = dict((e, p) for p, e in _FORMAT_PREFIXES)[exp3]
    if prefix == "u":
        prefix = micro
    mantissa = rounded / 10.0**exp3
    text = f"{mantissa:.{digits}g}"
    if "e" in text:  # never for in-range values, but keep it readable if it happens
        text = f"{mantissa:.{digits}f}".rstrip("0").rstrip(".")
    return f"{text} {prefix}{unit}".rstrip()


def format_rkm(value: float, quantity: str = "C", digits: int = 3) -> str:
    """IEC 60062 RKM code: 4.7e-6 (C) -> '4u7', 1500 (R) -> '1K5', 0.47 (R) -> 'R47'.

    The letter sits where the decimal point would be; whole values get a trailing zero digit
    only below ten (1n0, 1K0) as the standard's tables write them.
    """
    v = float(value)
    if not math.isfinite(v) or v <= 0:
        raise UserError(f"RKM code needs a positive finite value, got {value!r}")
    letters = (("p", -12), ("n", -9), ("u", -6), ("m", -3), ("F", 0)) if quantity == "C" else \
        (("R", 0), ("K", 3), ("M", 6), ("G", 9), ("T", 12))
    exp10 = math.floor(math.log10(v))
    v = round(v, -exp10 + digits - 1)
    letter, exp = letters[0]
    for cand, e in letters:
        if v >= 10.0**e:
            letter, exp = cand, e
    mantissa = v / 10.0**exp
    whole_text, frac = f"{mantissa:.{digits}f}".split(".")
    whole = int(whole_text)
    frac = frac.rstrip("0")
    if whole == 0:
        return f"{letter}{frac or '0'}"
    if not frac and whole < 10:
        frac = "0"
    return f"{whole}{letter}{frac}"
