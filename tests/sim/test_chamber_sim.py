"""The simulated climate chamber: thermal physics against outside references, and its SCPI.

References: the step response of an underdamped second-order system (overshoot
exp(-pi*zeta/sqrt(1 - zeta^2)), peak at pi/(w*sqrt(1 - zeta^2)) [published: the standard
second-order step-response relations of any control-engineering handbook]); scipy.signal.lsim
for the whole linear system under a ramp; the part lagging the chamber air [common practice:
after the air reaches a set point the part lags with the fixture's thermal time constant].
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import signal

from instruments.clock import VirtualClock
from benchkit.commands.sim import demo_bench
from instruments.sim.thermal import ChamberParams, ThermalChamber


def open_res(rm, resource):
    return rm.open_resource(resource, read_termination="\n", write_termination="\n",
                            timeout=3000, open_timeout=3000)


def test_air_step_response_has_the_second_order_overshoot_and_peak_time():
    clock = VirtualClock()
    p = ChamberParams()
    th = ThermalChamber(clock, 25.0, p)
    th.set_rate(1e9)                    # a step of the controlled set point
    th.set_target(35.0)
    t, air = [], []
    for _ in range(600):
        clock.advance(1.0)
        t.append(clock.now())
        air.append(th.air_C())
    air = np.array(air)
    zeta, w = p.air_damping, 1.0 / p.air_tau_s
    overshoot = math.exp(-math.pi * zeta / math.sqrt(1 - zeta**2))
    assert (air.max() - 35.0) / 10.0 == pytest.approx(overshoot, abs=2e-3)   # 0.0948
    t_peak = math.pi / (w * math.sqrt(1 - zeta**2))
    assert t[int(air.argmax())] == pytest.approx(t_peak, abs=2.0)             # 235.6 s


def test_air_fixture_and_part_match_scipy_lsim_under_a_ramp():
    # the same linear system integrated by scipy.signal.lsim from the same input u(t)
    clock = VirtualClock()
    p = ChamberParams()
    th = ThermalChamber(clock, 25.0, p)
    rate = 2.0 / 60.0
    th.set_rate(rate)
    th.set_target(85.0)
    times = np.arange(0.0, 5400.0, 5.0)
    got = []
    for k, t in enumerate(times):
        if k:
            clock.advance(t - times[k - 1])
        got.append((th.air_C(), th.fixture_C(), th.part_C()))
    got = np.array(got)
    w, z = 1.0 / p.air_tau_s, p.air_damping
    A = [[0, 1, 0, 0], [-w * w, -2 * z * w, 0, 0], [1 / p.fixture_tau_s, 0, -1 / p.fixture_tau_s, 0],
         [0, 0, 1 / p.part_tau_s, -1 / p.part_tau_s]]
    B = [[0], [w * w], [0], [0]]
    C = [[1, 0, 0, 0], [0, 0, 1, 0], [0, 0, 0, 1]]
    fine = np.arange(0.0, 5400.0, 0.25)
    u = np.minimum(25.0 + rate * fine, 85.0) - 25.0
    _, y, _ = signal.lsim((A, B, C, [[0]] * 3), u, fine)
    ref = y[::20] + 25.0
    assert np.max(np.abs(got - ref)) < 0.02


def test_state_ramp_settle_stable_and_the_part_still_lags_when_stable():
    clock = VirtualClock()
    th = ThermalChamber(clock, 25.0)
    th.set_rate(0.05)
    th.set_target(125.0)
    assert th.state() == "RAMP"
    seen, first_stable = [], None
    for _ in range(3 * 3600 // 10):
        clock.advance(10.0)
        s = th.state()
        if not seen or seen[-1] != s:
            seen.append(s)
        if s == "STABLE" and first_stable is None:
            first_stable = (th.air_C(), th.fixture_C(), th.part_C())
    assert seen == ["RAMP", "SETTLE", "STABLE"]
    air, fixture, part = first_stable
    assert abs(air - 125.0) <= 0.5
    assert 125.0 - part > 2.0 and part < fixture < 125.0    # chamber stable, part not yet there
    assert th.part_C() == pytest.approx(125.0, abs=1e-3)  # hours later it is


def test_drift_moves_everything_and_teleport_resets_it():
    clock = VirtualClock()
    th = ThermalChamber(clock, 25.0)
    th.start_drift(0.5)
    clock.advance(120.0)
    assert th.air_C() == pytest.approx(26.0) and th.part_C() == pytest.approx(26.0)
    th.teleport(85.0)
    assert th.part_C() == 85.0 and th.state() == "STABLE"


def test_chamber_over_scpi_set_point_rate_state_and_thermometer_on_the_fixture(rm):
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        ch = open_res(rm, bench.resources["chamber"])
        th = open_res(rm, bench.resources["thermometer"])
        try:
            assert ch.query("*IDN?").startswith("benchkit-sim,SIM-CHAMBER,")
            assert float(ch.query("SOUR:TEMP?")) == 25.0
            assert ch.query("STAT:TEMP?") == "STAB"
            ch.write("SOURce:TEMPerature:RATE 0.1")
            ch.write("SOURce:TEMPerature 85")
            assert ch.query("SYST:ERR?") == '0,"No error"'
            assert float(ch.query("SOUR:TEMP:RATE?")) == 0.1
            assert ch.query("STAT:TEMP?") == "RAMP"
            clock.sleep(900.0)
            air = float(ch.query("MEAS:TEMP?"))
            fixture = float(th.query("MEAS:TEMP?"))
            state = bench.chamber_state()
            assert abs(air - state["air_C"]) < 1e-6
            # the thermometer sits on the fixture: it lags the air, the part lags it
            assert abs(fixture - state["fixture_C"]) < 0.2
            assert state["part_C"] < state["fixture_C"] < air
            ch.write("SOUR:TEMP 200")                         # -222 Data out of range
            assert ch.query("SYST:ERR?").startswith("-222,")
            assert float(ch.query("SOUR:TEMP?")) == 85.0
            ch.write("*RST")
            assert float(ch.query("SOUR:TEMP?")) == 25.0
        finally:
            ch.close()
            th.close()


def test_the_meter_reads_the_part_at_the_part_temperature_not_the_air(rm):
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        m, sc, ch = (open_res(rm, bench.resources[r]) for r in ("meter", "scanner", "chamber"))
        try:
            sc.write("ROUT:CLOS (@1)")
            # the scanner is its own instrument: wait until it has closed the channel before
            # the meter reads (IEEE 488.2 *OPC?), or a loaded machine reads the open fixture
            assert sc.query("*OPC?") == "1"
            ch.write("SOUR:TEMP:RATE 0.5")
            ch.write("SOUR:TEMP 85")
            assert ch.query("*OPC?") == "1"
            clock.sleep(400.0)
            part = bench.chamber_state()["part_C"]
            c = np.mean([float(m.query("READ?").split(",")[0]) for _ in range(5)])
            at_part = bench.true_settled_C_F(1, 0.0, temp_C=part)
            at_air = bench.true_settled_C_F(1, 0.0, temp_C=bench.chamber_state()["air_C"])
            assert c == pytest.approx(at_part, rel=3e-3)
            assert abs(at_part / at_air - 1) > 3e-3     # the two differ: the check can fail
        finally:
            for r in (m, sc, ch):
                r.close()


def test_refuse_fault_keeps_the_set_point_and_reports_minus_221(rm):
    with demo_bench(clock=VirtualClock()) as bench:
        ch = open_res(rm, bench.resources["chamber"])
        try:
            bench.inject("refuse:after=0")
            ch.write("SOUR:TEMP 125")
            assert ch.query("SYST:ERR?").startswith("-221,")
            assert float(ch.query("SOUR:TEMP?")) == 25.0
            ch.write("SOUR:TEMP 125")              # once: the next set point is taken
            assert float(ch.query("SOUR:TEMP?")) == 125.0
        finally:
            ch.close()


def test_unstable_fault_never_lets_the_chamber_report_stable(rm):
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        ch = open_res(rm, bench.resources["chamber"])
        try:
            bench.inject("unstable:after=0:amp=3")
            ch.write("SOUR:TEMP 30")
            states = set()
            for _ in range(240):
                clock.sleep(30.0)
                states.add(ch.query("STAT:TEMP?"))
            assert "STAB" not in states and "SETT" in states
        finally:
            ch.close()
