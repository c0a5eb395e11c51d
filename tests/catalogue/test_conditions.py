"""Default meter conditions against the table of IEC 60384-1 clause 4.2.2 with -21/-22."""

import pytest

from benchkit.catalogue.conditions import default_function, dielectric_class, standard_conditions
from benchkit.errors import UserError


# [standard: IEC 60384-1 clause 4.2.2 with IEC 60384-21 (class 1) and IEC 60384-22 (class 2),
# as quoted in detail specifications]: class 1 <= 1000 pF: 1 MHz, 1.0 Vrms; class 1 > 1000 pF:
# 1 kHz, 1.0 Vrms; class 2 <= 10 uF: 1 kHz, 1.0 Vrms; class 2 > 10 uF: 120 Hz, 0.5 Vrms.
@pytest.mark.parametrize(
    "code, C_F, freq_Hz, level_Vrms, sectional",
    [
        ("C0G", 100e-12, 1e6, 1.0, "IEC 60384-21"),
        ("C0G", 1000e-12, 1e6, 1.0, "IEC 60384-21"),  # boundary belongs to "<= 1000 pF"
        ("C0G", 1001e-12, 1e3, 1.0, "IEC 60384-21"),
        ("U2J", 10e-9, 1e3, 1.0, "IEC 60384-21"),
        ("X7R", 100e-9, 1e3, 1.0, "IEC 60384-22"),
        ("X5R", 10e-6, 1e3, 1.0, "IEC 60384-22"),  # boundary belongs to "<= 10 uF"
        ("X5R", 1e-5, 1e3, 1.0, "IEC 60384-22"),  # same value written another way
        ("X5R", 22e-6, 120.0, 0.5, "IEC 60384-22"),
        ("Y5V", 100e-6, 120.0, 0.5, "IEC 60384-22"),
    ],
)
def test_standard_conditions_table(code, C_F, freq_Hz, level_Vrms, sectional):
    c = standard_conditions(code, C_F)
    assert (c.freq_Hz, c.ac_level_Vrms) == (freq_Hz, level_Vrms)
    assert "IEC 60384-1 clause 4.2.2" in c.source and sectional in c.source


# [standard: EIA-198]: X/Y/Z + digit + letter codes are class 2; C0G (NP0) and U2J are class 1.
@pytest.mark.parametrize("code, cls", [("X7R", 2), ("X5R", 2), ("Y5V", 2), ("Z5U", 2), ("X6S", 2),
                                       ("C0G", 1), ("NP0", 1), ("U2J", 1), ("c0g", 1)])
def test_dielectric_class_from_code(code, cls):
    assert dielectric_class(code) == cls


def test_unknown_class_code_is_one_clear_error():
    with pytest.raises(UserError, match="class code 'ABC'"):
        standard_conditions("ABC", 1e-6)


# [common practice: impedance-measurement handbooks]: series equivalent for low impedance
# (below about 100 ohm), parallel for high (above about 10 kohm). |Z| = 1/(2 pi f C).
def test_default_function_follows_impedance():
    assert default_function(10e-6, 1e3) == "CSD"  # 15.9 ohm
    assert default_function(100e-12, 1e6) == "CPD"  # 1.59 kohm
    assert default_function(10e-9, 1e3) == "CPD"  # 15.9 kohm
