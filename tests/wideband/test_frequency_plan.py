"""The plan's [frequency] table: lists, decades, refusals in one line; readings to Z.

Sources: handbook relations Z = Rs - j/(w*Cs) and Z = |Z|*exp(j*theta) [published:
impedance-measurement handbook relations]; points per decade spaced evenly in log10 f
[common practice].
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchkit.errors import UserError
from benchkit.sweep.frequency import parse_frequency, reading_to_Z, row_values
from benchkit.sweep.plan import METER_FREQ_RANGE_HZ, METER_LEVEL_RANGE_VRMS


def parse(raw):
    return parse_frequency(raw, "plan.toml", METER_FREQ_RANGE_HZ, METER_LEVEL_RANGE_VRMS)


def test_points_per_decade_are_even_in_log_frequency():
    fq = parse({"start_Hz": 100.0, "stop_Hz": 1e7, "points_per_decade": 5})
    f = np.array(fq["freq_Hz"])
    assert f.size == 26 and f[0] == 100.0 and f[-1] == 1e7
    assert np.allclose(np.diff(np.log10(f)), 0.2, rtol=0, atol=1e-12)
    assert fq["function"] == "auto" and fq["correction"] is None


def test_explicit_list_sorted_and_checked():
    fq = parse({"list_Hz": [1e6, 100, 1e3], "function": "ztd",
                "correction": {"open_channel": 15, "short_channel": 16}})
    assert fq["freq_Hz"] == [100.0, 1e3, 1e6] and fq["function"] == "ZTD"
    assert fq["correction"] == {"open_channel": 15, "short_channel": 16}


@pytest.mark.parametrize("raw,field", [
    ({"list_Hz": [100, 100]}, "list_Hz"),
    ({"list_Hz": [10.0, 100]}, "list_Hz"),          # below the meter's 20 Hz
    ({"start_Hz": 100, "stop_Hz": 2e7, "points_per_decade": 5}, "stop_Hz"),
    ({"start_Hz": 100, "stop_Hz": 1e6, "points_per_decade": 0}, "points_per_decade"),
    ({"list_Hz": [100], "start_Hz": 100}, "list_Hz"),
    ({"list_Hz": [100], "function": "CPD"}, "function"),
    ({"list_Hz": [100], "correction": {"open_channel": 3, "short_channel": 3}}, "correction"),
    ({"list_Hz": [100], "freqs": [1]}, "freqs"),
])
def test_refusals_name_the_field(raw, field):
    with pytest.raises(UserError, match=rf"field 'frequency\.{field}'") as e:
        parse(raw)
    assert "\n" not in str(e.value)


def test_readings_to_impedance_and_back():
    f = 1e5
    w = 2 * math.pi * f
    Z = complex(0.02, -1 / (w * 2e-6))
    Cs, D, Rs = row_values(Z, f)
    assert Cs == pytest.approx(2e-6) and Rs == pytest.approx(0.02) and D == pytest.approx(w * 2e-6 * 0.02)
    assert reading_to_Z(Cs, Rs, "CSRS", f) == pytest.approx(Z, rel=1e-12)
    assert reading_to_Z(abs(Z), math.degrees(math.atan2(Z.imag, Z.real)), "ZTD", f) == pytest.approx(Z, rel=1e-12)
    # inductive: Cs comes out negative, as a meter shows it
    assert row_values(complex(0.01, 0.3), f)[0] < 0
