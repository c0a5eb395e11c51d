"""The simulated meter's second dialect, chosen when the bench starts, driven through a
profile only (instruments/sim/profiles/sim-alt-lcr.toml): other spellings, a status field,
automatic level control and an internal DC bias source.

Sources: V_dut = V_osc*|Zx|/|R_src + Zx| with R_src = 100 ohm and "level control adjusts V_osc
until V_dut matches the setting" [published: LCR meter manuals, generally; science.md 3];
IEC 60384-1 standard level for class 2 <= 10 uF: 1.0 +-0.2 Vrms at 1 kHz (science.md 2);
Z = Rs + 1/(j w Cs) and Cp = Cs/(1 + D^2) [published: impedance-measurement handbook].
"""

from __future__ import annotations

import math

import pytest

from instruments.clock import VirtualClock
from instruments.drivers import InstrumentError, LCRMeter, Scanner
from benchkit.commands.sim import demo_bench
from instruments.sim.bench import ALT_METER_PROFILE
from instruments.sim.physics import level_across_part_Vrms

R_SRC = 100.0   # the simulated meter's source resistance (COMMANDS.md)


@pytest.fixture(scope="module")
def alt():
    clock = VirtualClock()
    with demo_bench(clock=clock, dialect="alt") as b:
        yield b, clock


def open_meter(bench):
    return LCRMeter(bench.resources["meter"], profile=ALT_METER_PROFILE)


def test_the_generic_profile_does_not_speak_it(alt):
    bench, _ = alt
    with LCRMeter(bench.resources["meter"], profile="generic-lcr") as m:
        with pytest.raises(InstrumentError, match="-113"):
            m.freq_Hz = 1e3


def test_level_control_holds_the_standard_level_across_a_10_uF_part(alt):
    bench, _ = alt
    with open_meter(bench) as m, Scanner(bench.resources["scanner"]) as sc:
        sc.select(1)                                   # FX-01: BD-1001, 10 uF (data/parts.toml)
        m.function, m.freq_Hz, m.ac_level_Vrms = "CSD", 1e3, 1.0
        m.level_control_on = False
        r = m.measure()
        seen = m.ac_dut_Vrms
        # without level control: the divider of a 100 ohm source, from the reading itself
        w = 2 * math.pi * 1e3
        Z = complex(r.D / (w * r.C_F), -1 / (w * r.C_F))
        assert seen == pytest.approx(level_across_part_Vrms(1.0, Z, R_SRC), rel=0.02)
        assert seen < 0.8                              # outside 1.0 +-0.2 Vrms
        m.level_control_on = True
        r2 = m.measure()
        assert r2.status == "0" and r2.valid
        assert abs(m.ac_dut_Vrms - 1.0) <= 0.2         # IEC 60384-1 standard level
        assert m.level_control_on is True


def test_internal_bias_charges_the_part_and_shutdown_switches_it_off(alt):
    bench, clock = alt
    with Scanner(bench.resources["scanner"]) as sc:
        sc.select(3)
        with open_meter(bench) as m:
            assert m.has("internal_bias") and m.may_use("internal_bias")
            assert bench.supply_state()["output_on"] is False   # the profile's setup
            m.bias_V = 0.0
            m.bias_on = True
            m.bias_V = 2.0
            m.check_errors()
            clock.sleep(5.0)                           # feed 10 kohm x 10 uF: tau 0.1 s
            assert bench.part_voltage_V(3) == pytest.approx(2.0, abs=0.01)
            assert m.bias_measured_V == pytest.approx(2.0, abs=0.01)
            assert abs(m.bias_current_A) < 1e-4
            assert m.bias_V == 2.0 and m.bias_on is True
        # closing sent the profile's shutdown list: 0 V, bias off
        state = bench.supply_state()
        assert state["set_V"] == 0.0 and state["output_on"] is False


def test_overload_comes_with_its_status(alt):
    bench, _ = alt
    with open_meter(bench) as m, Scanner(bench.resources["scanner"]) as sc:
        sc.select(1)
        m.function = "CPD"
        bench.meter.arm_overload(1)
        r = m.measure()
        assert r.overload and r.status == "1" and math.isnan(r.C_F)
        assert m.measure().valid


def test_an_unknown_dialect_is_refused():
    from instruments.sim.bench import SimBenchError
    with pytest.raises(SimBenchError, match="dialect"):
        demo_bench(dialect="klingon")


def test_the_alt_profile_speaks_the_documented_alt_commands():
    # the alt section of COMMANDS.md, read by the same parser the generic profiles are checked with
    import re
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "drivers"))
    from test_profiles import COMMON, all_templates, documented_headers

    from instruments.drivers import load_profile

    docs = documented_headers()
    allowed = docs["LCR meter, alt dialect"] + docs[COMMON]
    prof = load_profile(ALT_METER_PROFILE)
    templates = all_templates(prof) + [(f"sequence.{i}", t) for i, t in
                                       enumerate(prof.setup + prof.shutdown)]
    for where, t in templates:
        header = t.header.lstrip(":")
        assert any(re.fullmatch(rx, header, re.I) for rx, _ in allowed), (where, t.text)


def test_meter_bias_ramps_within_the_profile_limits_and_ends_safe(alt):
    # the supply's guarantees [common practice]: never jump the bias, end at 0 V output off
    from instruments.drivers import InvalidValueError, MeterBias

    bench, clock = alt
    with Scanner(bench.resources["scanner"]) as sc:
        sc.select(3)
        with open_meter(bench) as m:
            with MeterBias(m) as b:
                assert b.voltage_range_V == (-40.0, 40.0)      # the profile's bias_V range
                with pytest.raises(InvalidValueError):
                    b.ramp_to(41.0, 1.0, clock)                # refused before anything is sent
                b.voltage_V = 0.0
                b.output_on = True
                t0 = clock.now()
                steps = b.ramp_to(3.0, 2.0, clock, max_step_V=0.5)
                assert [v for _, v in steps] == [0.0, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0]
                assert clock.now() - t0 >= 1.5                 # 3 V at 2 V/s
                clock.sleep(2.0)
                assert b.measured_voltage_V == pytest.approx(3.0, abs=0.01)
                assert bench.part_voltage_V(3) == pytest.approx(3.0, abs=0.01)
            # leaving the block ramped down on the clock of the last ramp, then switched off
            assert b.last_ramp[-1][1] == 0.0 and len(b.last_ramp) == 7
            assert m.bias_on is False and m.bias_V == 0.0
    assert bench.supply_state()["output_on"] is False


def test_meter_bias_needs_the_capability(alt):
    from instruments.drivers import MeterBias, ProfileError

    bench, _ = alt
    m = LCRMeter(bench.resources["meter"], profile="generic-lcr")
    with pytest.raises(ProfileError, match="internal bias"):
        MeterBias(m)
