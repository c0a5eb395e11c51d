"""benchkit.units: engineering values as the trade writes them.

Sources: IEC 60062 (letter and digit code, "RKM": the letter replaces the decimal point and
carries the multiplier; 4u7 = 4.7 uF, 2n2 = 2.2 nF, 100p; resistors 4R7, R47, 4K7, 1M0);
SI Brochure, 9th edition (BIPM 2019), table 7 (SI prefixes; symbols are case sensitive).
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from benchkit.errors import UserError
from benchkit.units import format_rkm, format_value, parse_value

# [standard: IEC 60062] capacitance RKM codes (examples from the standard's pattern; the
# table rows 1p0, 10p, 100p, 1n0, 10n, 100n, 1u0, 10u, 100u from memory of its layout)
IEC_60062_CAPACITANCE = [
    ("4u7", 4.7e-6), ("2n2", 2.2e-9), ("100p", 100e-12), ("p47", 0.47e-12), ("1p0", 1e-12),
    ("10p", 10e-12), ("1n0", 1e-9), ("10n", 10e-9), ("100n", 100e-9), ("1u0", 1e-6),
    ("10u", 10e-6), ("1m0", 1e-3), ("4F7", 4.7),
]
# [standard: IEC 60062] resistance RKM codes (R = decimal point, K kilo, M mega, G giga);
# lower-case k as in "1k5" [common practice]
IEC_60062_RESISTANCE = [
    ("R47", 0.47), ("4R7", 4.7), ("47R", 47.0), ("1K0", 1e3), ("4K7", 4.7e3), ("1k5", 1.5e3),
    ("1M0", 1e6), ("2M2", 2.2e6), ("1G0", 1e9),
]
# [standard: SI Brochure 9th ed., BIPM, table 7] prefixes by symbol (engineering subset)
SI_PREFIX_FACTORS = {"a": 1e-18, "f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "\u00b5": 1e-6,
                     "\u03bc": 1e-6, "m": 1e-3, "k": 1e3, "M": 1e6, "G": 1e9, "T": 1e12}


@pytest.mark.parametrize("text,value", IEC_60062_CAPACITANCE)
def test_rkm_capacitance(text, value):
    # [standard: IEC 60062] letter code as decimal marker and multiplier
    assert parse_value(text, "F") == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize("text,value", IEC_60062_RESISTANCE)
def test_rkm_resistance(text, value):
    # [standard: IEC 60062] resistance letters R, K, M, G
    assert parse_value(text, "ohm") == pytest.approx(value, rel=1e-15)


@pytest.mark.parametrize("symbol,factor", sorted(SI_PREFIX_FACTORS.items()))
def test_si_prefixes(symbol, factor):
    # [standard: SI Brochure 9th ed., table 7]: 2.5 <prefix> = 2.5 * factor
    assert parse_value(f"2.5{symbol}") == pytest.approx(2.5 * factor, rel=1e-15)


def test_si_prefix_case_matters():
    # [standard: SI Brochure 9th ed., 3]: m is milli and M is mega; never confused
    assert parse_value("1m") == 1e-3
    assert parse_value("1M") == 1e6


@pytest.mark.parametrize("text,unit,value", [
    ("4.7u", None, 4.7e-6), ("10uF", "F", 10e-6), ("10 uF", "F", 10e-6), ("100n", None, 100e-9),
    ("2.2e-6", None, 2.2e-6), ("2.2e-6F", "F", 2.2e-6), ("12V", "V", 12.0), ("-5", "V", -5.0),
    ("2.2kohm", "ohm", 2200.0), ("4.7 k\u03a9", "ohm", 4700.0), ("1kHz", "Hz", 1000.0), ("4u7F", "F", 4.7e-6),
])
def test_written_forms(text, unit, value):
    # [standard: SI Brochure 9th ed.]: value = number x prefix, unit symbol after it
    assert parse_value(text, unit) == pytest.approx(value, rel=1e-15)


def test_decimal_text_is_exact():
    # the nearest double to the decimal value, as Python's float() of "10e-6" [reference: IEEE 754
    # round-to-nearest as implemented by CPython float()]
    assert parse_value("10uF", "F") == float("10e-6")
    assert parse_value("4u7") == float("4.7e-6")


@pytest.mark.parametrize("bad", ["4x7", "", "   ", "4,7u", "4u7u", "1.2.3", "nan", "inf", "1e", "2.2e-6u",
                                 "u", "10 d", "4K7"])
def test_bad_values_one_line(bad):
    # one clear line naming the field (team rule); "4K7" is a resistance letter, refused for farads
    with pytest.raises(UserError) as exc:
        parse_value(bad, "F", field="--min")
    msg = str(exc.value)
    assert "\n" not in msg and msg.startswith("--min")


def test_rkm_capacitance_letter_refused_for_ohms():
    with pytest.raises(UserError, match="capacitance letter"):
        parse_value("4u7", "ohm")


@pytest.mark.parametrize("value,unit,text", [
    (4.7e-6, "F", "4.7 uF"), (1500.0, "ohm", "1.5 kohm"), (100e-9, "F", "100 nF"), (0.0, "F", "0 F"),
    (-3.3e-3, "A", "-3.3 mA"), (999.99e-9, "F", "1 uF"), (12.0, "V", "12 V"), (2.2e-12, "F", "2.2 pF"),
])
def test_format_value(value, unit, text):
    # engineering notation: mantissa in [1, 1000) with an SI prefix [standard: SI Brochure 9th ed.]
    assert format_value(value, unit) == text


@pytest.mark.parametrize("text,value", IEC_60062_CAPACITANCE[:-1])
def test_format_rkm_capacitance(text, value):
    # [standard: IEC 60062] writing back gives the standard's code
    assert format_rkm(value, "C") == text


@pytest.mark.parametrize("text,value", [t for t in IEC_60062_RESISTANCE if t[0] != "1k5"])
def test_format_rkm_resistance(text, value):
    assert format_rkm(value, "R") == text


@settings(max_examples=200, deadline=None)
@given(st.floats(min_value=1e-15, max_value=1e3), st.integers(min_value=3, max_value=15))
def test_format_then_parse_round_trip(x, digits):
    # what format_value writes, parse_value reads back to within the digits written
    back = parse_value(format_value(x, "F", digits=digits), "F")
    assert math.isclose(back, x, rel_tol=10 ** (1 - digits))


@settings(max_examples=200, deadline=None)
@given(st.integers(min_value=100, max_value=999), st.integers(min_value=-12, max_value=0))
def test_rkm_round_trip(mantissa, exp):
    # three significant digits, as the IEC 60062 codes carry them
    x = float(f"{mantissa}e{exp - 2}")
    assert parse_value(format_rkm(x, "C"), "F") == pytest.approx(x, rel=1e-12)
