"""The bias network of the simulated bench (instruments/sim/fixture.py) with stand-in parts.

The stand-in parts below are test doubles with a capacitance we choose, so the charging can be
checked against closed forms: the first-order RC step response V = V_inf*(1 - exp(-t/tau))
(circuit-theory handbook relation), the linear ramp of a capacitor fed by a constant current
(I = C dV/dt), and the nonlinear RC check value of science notes item 6.7, t = R*int C(v)/(Vs - v) dv
[derived].
"""

from __future__ import annotations

import math

import pytest

from instruments.clock import VirtualClock
from instruments.sim.fixture import BiasFixture, FixtureError, Wiring


class StandInPart:
    """C = C0/(1 + (V/Vk)^2) (Vk = inf: linear), ohmic leakage G; records what it is told."""

    def __init__(self, time, C0_F=1e-6, Vk_V=math.inf, G_S=0.0):
        self.time = time
        self.C0_F, self.Vk_V, self.G_S = C0_F, Vk_V, G_S
        self.V = 0.0
        self.calls = []   # (t_s, V) of every set_bias
        self.temps = []

    def set_bias(self, V):
        self.V = V
        self.calls.append((self.time.now(), V))

    def C_now_F(self, temp_C=25.0):
        self.temps.append(temp_C)
        return self.C0_F / (1 + (self.V / self.Vk_V) ** 2)

    def leakage_current_A(self, V):
        return self.G_S * V

    def measure(self, freq_Hz, osc_level_Vrms, temp_C, source_R_ohm=100.0):
        return ("reading", self.V, temp_C)


def make(clock, parts, **wiring):
    factories = {ch: (lambda time, kw=kw: StandInPart(time, **kw)) for ch, kw in parts.items()}
    fx = BiasFixture(clock, factories, wiring=Wiring(**wiring))
    return fx


def test_linear_rc_step_response_matches_the_closed_form():
    # handbook relation (first-order RC): V(t) = V_inf*(1 - exp(-t/tau)),
    # V_inf = Vs*Gf/(Gf + G), tau = C/(Gf + G)
    clock = VirtualClock()
    C, Rf, G = 2e-6, 10e3, 1e-7
    fx = make(clock, {1: dict(C0_F=C, G_S=G)}, feed_R_ohm=Rf)
    fx.close_channel(1)
    fx.set_output(True)
    fx.set_voltage(5.0)
    Gf = 1 / Rf
    V_inf, tau = 5.0 * Gf / (Gf + G), C / (Gf + G)
    for t in (0.001, 0.005, 0.02, 0.1, 1.0):
        clock.advance(t - (clock.now()))
        assert fx.part_voltage_V(1) == pytest.approx(V_inf * (1 - math.exp(-t / tau)), rel=1e-9)
        # supply current = charging + leakage = (Vs - V)/Rf through the feed resistor
        assert fx.supply_current_A() == pytest.approx((5.0 - fx.part_voltage_V(1)) / Rf, rel=1e-9)
        assert fx.terminal_V() == 5.0


@pytest.mark.parametrize("commands_per_s", [None, 1000])
def test_nonlinear_rc_charge_matches_the_check_value(commands_per_s):
    # science notes item 6.7 [derived]: C = C0/(1 + V^2), R = 1 ohm, C0 = 1 F, 1 V step:
    # 0.5 V at 0.634183 s, 63.2 % at 0.865894 s (t = R*int C(v)/(Vs - v) dv).
    # Integrated in one go (nobody asks in between) and with a command every millisecond.
    clock = VirtualClock()
    fx = make(clock, {1: dict(C0_F=1.0, Vk_V=1.0)}, feed_R_ohm=1.0)
    fx.limit_A = 1e3  # beyond the SCPI range on purpose: no current limit in this check
    fx.close_channel(1)
    fx.set_output(True)
    fx.set_voltage(1.0)
    for t_check, V_check in ((0.634183, 0.5), (0.865894, 1 - math.exp(-1))):
        if commands_per_s:
            while clock.now() + 1 / commands_per_s < t_check:
                clock.advance(1 / commands_per_s)
                fx.advance()
        clock.advance(t_check - clock.now())
        assert fx.part_voltage_V(1) == pytest.approx(V_check, rel=2.5e-3)


def test_constant_current_ramp_and_sagging_terminal_voltage():
    # common practice (CV/CC crossover of a bench supply): in current limit the part charges
    # at I/C (I = C dV/dt) and the terminal voltage is V_part + I*R_feed, below the setting
    clock = VirtualClock()
    C, Rf, I = 1e-6, 10e3, 1e-4
    fx = make(clock, {1: dict(C0_F=C)}, feed_R_ohm=Rf)
    fx.close_channel(1)
    fx.set_current_limit(I)
    fx.set_output(True)
    fx.set_voltage(5.0)
    assert fx.terminal_V() == pytest.approx(I * Rf)     # part still at 0 V
    clock.advance(0.02)
    V = fx.part_voltage_V(1)
    assert V == pytest.approx(I * 0.02 / C, rel=1e-9)   # 2 V
    assert fx.supply_current_A() == pytest.approx(I)
    assert fx.terminal_V() == pytest.approx(V + I * Rf)
    assert fx.terminal_V() < 5.0
    # the ramp ends where the demand equals the limit: (5 - V)/Rf = I at V = 4 V (t = 40 ms);
    # from there an RC approach: V = 5 - 1*exp(-(t - 0.04)/(Rf*C))
    clock.advance(0.05 - 0.02)
    assert fx.part_voltage_V(1) == pytest.approx(5 - math.exp(-0.01 / (Rf * C)), rel=1e-9)
    assert fx.terminal_V() == 5.0


def test_constant_current_below_the_leakage_stays_sagged():
    # common practice: a limit below what the load draws at the set voltage never recovers;
    # the part settles where I = G*V
    clock = VirtualClock()
    fx = make(clock, {1: dict(C0_F=1e-6, G_S=1e-6)}, feed_R_ohm=10e3)
    fx.close_channel(1)
    fx.set_current_limit(1e-6)
    fx.set_output(True)
    fx.set_voltage(5.0)
    clock.advance(3600)
    assert fx.part_voltage_V(1) == pytest.approx(1.0, rel=1e-6)  # I/G
    assert fx.terminal_V() == pytest.approx(1.0 + 1e-6 * 10e3, rel=1e-6)


def test_output_off_discharges_through_feed_and_bleed():
    # handbook relation (RC discharge): V = V0*exp(-t/((R_feed + R_bleed)*C)); the supply
    # reads 0 V with its output off (COMMANDS.md)
    clock = VirtualClock()
    C, Rf, Rb = 1e-6, 10e3, 100e3
    fx = make(clock, {1: dict(C0_F=C)}, feed_R_ohm=Rf, bleed_R_ohm=Rb)
    fx.close_channel(1)
    fx.set_output(True)
    fx.set_voltage(3.0)
    clock.advance(1.0)          # 100 tau: charged
    fx.set_output(False)
    V0 = fx.part_voltage_V(1)
    assert V0 == pytest.approx(3.0, rel=1e-9)
    clock.advance(0.1)
    assert fx.part_voltage_V(1) == pytest.approx(V0 * math.exp(-0.1 / ((Rf + Rb) * C)), rel=1e-9)
    assert fx.terminal_V() == 0.0
    assert fx.supply_current_A() == 0.0


def test_part_on_an_open_channel_keeps_its_charge_and_leaks():
    # handbook relation (self-discharge through the insulation): V = V0*exp(-t*G/C)
    clock = VirtualClock()
    C, G = 1e-6, 1e-9   # tau = 1000 s
    fx = make(clock, {1: dict(C0_F=C, G_S=G), 2: dict(C0_F=C)})
    fx.close_channel(1)
    fx.set_output(True)
    fx.set_voltage(5.0)
    clock.advance(1.0)
    V0 = fx.part_voltage_V(1)
    fx.open_channel(1)
    fx.close_channel(2)   # the supply now charges the other part
    clock.advance(100.0)
    assert fx.part_voltage_V(1) == pytest.approx(V0 * math.exp(-100.0 * G / C), rel=1e-6)
    assert fx.part_voltage_V(2) == pytest.approx(5.0, rel=1e-9)


def test_part_sees_its_bias_change_when_it_happens_not_when_asked():
    # design requirement (lazy integration): the part's clock reads the time of each change
    clock = VirtualClock()
    fx = make(clock, {1: dict(C0_F=1e-6)}, feed_R_ohm=10e3)   # tau = 10 ms
    fx.close_channel(1)
    fx.set_output(True)
    fx.set_voltage(2.0)
    clock.advance(100.0)
    fx.advance()
    part = fx.part(1)
    times = [t for t, _ in part.calls]
    assert times == sorted(times)
    assert times[-1] < 0.2               # the charging was over long before 100 s
    assert part.calls[-1][1] == pytest.approx(2.0, abs=1e-3)
    assert part.time.now() == 100.0      # and the part is now at the present


def test_chamber_temperature_reaches_the_part():
    # design requirement: the part physics is told the chamber temperature
    clock = VirtualClock()
    fx = make(clock, {1: dict(C0_F=1e-6)})
    fx.close_channel(1)
    fx.set_temperature(85.0)
    fx.set_output(True)
    fx.set_voltage(1.0)
    clock.advance(0.5)
    fx.advance()
    assert set(fx.part(1).temps) == {85.0}
    assert fx.measure(1e3, 1.0)[2] == 85.0


def test_temperature_drift_ramps_with_clock_time():
    # Fault temp-drift: rate in degC per clock minute
    clock = VirtualClock()
    fx = make(clock, {1: dict()})
    fx.start_temp_drift(0.5)
    clock.advance(120.0)
    assert fx.temp_C() == pytest.approx(26.0)


def test_break_before_make_and_unknown_channel():
    # COMMANDS.md: one closed channel at a time
    clock = VirtualClock()
    fx = make(clock, {1: dict(), 2: dict()})
    fx.close_channel(1)
    with pytest.raises(FixtureError, match="channel 1 is closed"):
        fx.close_channel(2)
    with pytest.raises(FixtureError, match="no part on channel 9"):
        fx.part(9)
    with pytest.raises(FixtureError, match="outside 1 .. 16"):
        make(clock, {17: dict()})
