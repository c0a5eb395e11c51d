"""Marking codes against their standards: EIA-198 class codes, IEC 60062 tolerance letters and
RKM values (benchkit.units)."""

import pytest

from benchkit.catalogue import codes
from benchkit.errors import UserError


@pytest.mark.parametrize("code, low, high, minus, plus", [
    # EIA-198 class-2 codes, as restated in consistent secondary tables [standard: EIA-198]
    ("X7R", -55, 125, 15, 15),
    ("X5R", -55, 85, 15, 15),
    ("Y5V", -30, 85, 82, 22),
    ("Z5U", 10, 85, 56, 22),
    ("X6S", -55, 105, 22, 22),
    ("X7T", -55, 125, 33, 22),
    ("X8R", -55, 150, 15, 15),
    ("X9P", -55, 200, 10, 10),
    ("Y4F", -30, 65, 7.5, 7.5),
])
def test_class2_codes_give_range_and_change(code, low, high, minus, plus):
    c = codes.parse_class_code(code)
    assert c.dielectric_class == 2
    assert (c.low_temp_C, c.high_temp_C) == (low, high)
    assert (c.change_minus_pct, c.change_plus_pct) == (minus, plus)
    # the band holds anywhere in the range [standard: EIA-198: the code bounds the change
    # over the whole range, referred to 25 degC]
    assert c.change_bounds_pct(high) == (-minus, plus)
    assert codes.format_class_code(low, high, minus, plus) == code


def test_every_class2_combination_round_trips():
    # EIA-198 codes are composed character by character [standard: EIA-198]
    n = 0
    for lo in codes.CLASS2_LOW_TEMP_C:
        for hi in codes.CLASS2_HIGH_TEMP_C:
            for ch in codes.CLASS2_CHANGE_PCT:
                c = codes.parse_class_code(lo + hi + ch)
                assert codes.format_class_code(c.low_temp_C, c.high_temp_C,
                                               c.change_minus_pct, c.change_plus_pct) == lo + hi + ch
                n += 1
    assert n == 3 * 6 * 7


def test_class1_codes():
    # C0G = 0 +- 30 ppm/K, U2J = -750 +- 120 ppm/K [standard: EIA-198]
    c0g = codes.parse_class_code("C0G")
    assert (c0g.dielectric_class, c0g.tc_ppm_per_K, c0g.tc_tol_ppm_per_K) == (1, 0, 30)
    assert codes.parse_class_code("COG") == c0g  # letter O for digit 0, common practice
    u2j = codes.parse_class_code("u2j")
    assert (u2j.tc_ppm_per_K, u2j.tc_tol_ppm_per_K) == (-750, 120)
    # at 125 degC (100 K above the 25 degC reference): U2J -870..-630 ppm/K * 100 K
    # = -8.7 % .. -6.3 % [derived from EIA-198's coefficient]
    lo, hi = u2j.change_bounds_pct(125.0)
    assert lo == pytest.approx(-8.7) and hi == pytest.approx(-6.3)
    lo, hi = c0g.change_bounds_pct(-55.0)  # 80 K below: +-30 ppm/K -> +-0.24 % [derived]
    assert lo == pytest.approx(-0.24) and hi == pytest.approx(0.24)


@pytest.mark.parametrize("bad", ["X7", "W7R", "X3R", "X7Q", "", "NP1"])
def test_unknown_class_codes_are_refused_in_one_line(bad):
    with pytest.raises(UserError) as exc:
        codes.parse_class_code(bad)
    assert "\n" not in str(exc.value) and "X7R" in str(exc.value)


def test_outside_the_code_range_is_refused():
    # X5R promises nothing above +85 degC [standard: EIA-198]
    with pytest.raises(UserError, match="outside the range"):
        codes.parse_class_code("X5R").change_bounds_pct(100.0)


@pytest.mark.parametrize("letter, kind, minus, plus", [
    # IEC 60062 tolerance letters [standard: IEC 60062]
    ("B", "pF", 0.1, 0.1), ("C", "pF", 0.25, 0.25), ("D", "pF", 0.5, 0.5),
    ("F", "pct", 1, 1), ("G", "pct", 2, 2), ("J", "pct", 5, 5), ("K", "pct", 10, 10),
    ("M", "pct", 20, 20), ("Z", "pct", 20, 80),
])
def test_tolerance_letters(letter, kind, minus, plus):
    t = codes.parse_tolerance(letter)
    assert (t.kind, t.minus, t.plus, t.letter) == (kind, minus, plus, letter)
    assert codes.parse_tolerance(letter.lower()) == t
    assert codes.tolerance_letter_for(minus, plus, kind) == letter


def test_tolerance_limits():
    # K on 10 uF: 9..11 uF; Z on 10 uF: 8..18 uF; C on 4.7 pF: 4.45..4.95 pF [standard: IEC 60062]
    lo, hi = codes.parse_tolerance("K").limits(10e-6)
    assert lo == pytest.approx(9e-6) and hi == pytest.approx(11e-6)
    lo, hi = codes.parse_tolerance("Z").limits(10e-6)
    assert lo == pytest.approx(8e-6) and hi == pytest.approx(18e-6)
    lo, hi = codes.parse_tolerance("C").limits(4.7e-12)
    assert lo == pytest.approx(4.45e-12) and hi == pytest.approx(4.95e-12)


@pytest.mark.parametrize("text, minus, plus, kind", [
    ("10%", 10, 10, "pct"), ("+-10 %", 10, 10, "pct"), ("\u00b15%", 5, 5, "pct"),
    ("+80/-20%", 20, 80, "pct"), ("0.25pF", 0.25, 0.25, "pF"),
])
def test_tolerance_bands_written_out(text, minus, plus, kind):
    t = codes.parse_tolerance(text)
    assert (t.minus, t.plus, t.kind) == (minus, plus, kind)


@pytest.mark.parametrize("bad", ["X", "10", "ten %", "-10%", "+10/-20pF%", "100%"])
def test_bad_tolerances(bad):
    with pytest.raises(UserError):
        codes.parse_tolerance(bad)


@pytest.mark.parametrize("rkm, value", [
    # IEC 60062 RKM writing: 4u7 = 4.7 uF, 2n2 = 2.2 nF, 100p [standard: IEC 60062]
    ("4u7", 4.7e-6), ("2n2", 2.2e-9), ("100p", 100e-12), ("p47", 0.47e-12),
])
def test_rkm_values_through_benchkit_units(rkm, value):
    units = pytest.importorskip("benchkit.units")
    assert units.parse_value(rkm, "F") == pytest.approx(value, rel=1e-12)
    assert units.format_rkm(value, "C") == rkm
