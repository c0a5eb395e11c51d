"""The wiring of the simulated bench: supply, feed resistor, scanner channels, parts, chamber.

Circuit (one closed channel at a time, break before make):

    supply (V_set, current limit) --- R_feed ---+--- part on the closed channel
                                                |
    LCR meter (100 ohm source) --- blocking C --+

- Output on: the part charges through R_feed with time constant R_feed*C(V), C from the
  part's own C(V) at each sub-step; the supply delivers charging plus leakage current.
- When that current would exceed the (effective) current limit the supply goes constant-
  current: the part charges at I_lim/C and the supply's terminal voltage sags to
  V_part + I_lim*R_feed (common practice: CV/CC crossover of a bench supply).
- Output off: the supply reads 0 V and the part discharges through R_feed + R_bleed (the
  supply's output-off bleeder).
- A part on an open channel keeps its charge, decaying through its own insulation resistance.
- Temperature: the chamber's air, the fixture and the parts (instruments/sim/thermal.py); the
  physics is read at the parts' temperature, the thermometer reads the fixture's.

The physics time of each part is the integration time of this module, so a part sees its
bias change at the moment it really changed, even when nobody asked the bench for an hour
(the bench integrates lazily, on the next command). One re-entrant lock guards everything.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from typing import Callable, Mapping, Protocol

from instruments.sim.thermal import ThermalChamber

REPORT_STEP_V = 1e-3  # bias changes smaller than this are not passed to the part
MAX_DV_PER_STEP_V = 0.05  # sub-step so that C(V) is re-evaluated at least every 50 mV
MAX_STEPS_PER_ADVANCE = 20000
SETTLE_V = 1e-6  # closer than this to its target a part counts as charged


class BenchPart(Protocol):
    """What the fixture needs of a simulated part (instruments/sim/physics.SimulatedPart)."""

    def set_bias(self, V: float) -> None: ...
    def C_now_F(self, temp_C: float = 25.0) -> float: ...
    def measure(self, freq_Hz: float, osc_level_Vrms: float, temp_C: float,
                source_R_ohm: float = 100.0): ...
    def true_settled_C_F(self, bias_V: float, branch: str = "rising", freq_Hz: float = 1e3,
                         ac_level_Vrms: float | None = None, temp_C: float = 25.0) -> float: ...
    def leakage_current_A(self, V: float) -> float: ...


class FixtureError(ValueError):
    """A request the fixture cannot honour (e.g. an unknown channel)."""


@dataclass(frozen=True)
class Wiring:
    """Component values of the bias fixture (invented, typical of a home-made fixture)."""

    feed_R_ohm: float = 10e3  # high next to the meter's 100 ohm source (common practice)
    bleed_R_ohm: float = 100e3  # supply output-off bleeder
    source_R_ohm: float = 100.0  # meter source resistance (COMMANDS.md)
    stray_C_F: float = 2e-12  # open fixture
    stray_G_S: float = 1e-10
    residual_R_ohm: float = 1e-3  # short fixture: leads and contacts in series with the part
    residual_L_H: float = 10e-9
    short_channel: int | None = 16  # scanner channel wired to a shorting bar (None: no short)

    @property
    def residuals(self):
        """The fixture's L network (instruments/sim/wideband.py)."""
        from instruments.sim.wideband import FixtureResiduals

        return FixtureResiduals(self.residual_R_ohm, self.residual_L_H, self.stray_C_F,
                                self.stray_G_S)


class PartTime:
    """The clock a part sees: the fixture's integration time, set before every call."""

    def __init__(self, t_s: float, virtual: bool):
        self.t_s = t_s
        self.virtual = virtual

    def now(self) -> float:
        return self.t_s


def _substep(step: "_Law", V: float, C: float, remaining: float,
             max_dV: float = MAX_DV_PER_STEP_V) -> tuple[float, float, bool] | None:
    """(dt, V after dt, settled) of one sub-step with capacitance C; None if nothing moves.

    The exponential step is exact for a constant C, so the step size only limits how far V
    (and with it C) moves: at most max_dV. settled: the rest of the way to the target is
    within max_dV, so the whole of `remaining` is done in this step.
    """
    if step.G_S > 0:
        tau = C / step.G_S
        gap = step.target_V - V
        if step.crossover_V is not None:
            to_cross = step.crossover_V - V
            if to_cross * gap > 0 and abs(to_cross) < abs(gap):
                dt_cross = -tau * math.log1p(-to_cross / gap)
                if dt_cross <= remaining and abs(to_cross) <= max_dV:
                    return dt_cross, step.crossover_V, False  # constant current ends here
        if abs(gap) <= max_dV:
            if abs(gap) > SETTLE_V:
                # first to within SETTLE_V of the target, so the part is told the end of the
                # charging when it happened, not when somebody asked
                dt = tau * math.log(2 * abs(gap) / SETTLE_V)  # to SETTLE_V/2: no chatter
                if dt < remaining:
                    return dt, step.target_V - gap * math.exp(-dt / tau), False
            return (remaining, step.target_V - gap * math.exp(-remaining / tau),
                    step.crossover_V is None)
        dt = min(remaining, -tau * math.log1p(-max_dV / abs(gap)))
        return dt, step.target_V - gap * math.exp(-dt / tau), False
    if step.current_A:
        rate = step.current_A / C  # ideal part in constant current: a linear ramp
        dt = min(remaining, max_dV / abs(rate))
        dt_cross = (step.crossover_V - V) / rate
        if 0 <= dt_cross <= dt:
            return dt_cross, step.crossover_V, False
        return dt, V + rate * dt, False
    return None  # an ideal part on its own keeps its charge


@dataclass(frozen=True)
class _Law:
    """The part's charging law over one sub-step (see BiasFixture._network_law)."""

    target_V: float
    G_S: float
    crossover_V: float | None = None  # constant current ends here
    current_A: float = 0.0


class _Slot:
    def __init__(self, channel: int, part: BenchPart, time: PartTime):
        self.channel = channel
        self.part = part
        self.time = time
        self.V = 0.0  # voltage across the part
        self.reported_V = 0.0  # last value given to part.set_bias
        self.last_point: tuple[float, float] | None = None  # (V, C) of the last sub-step


class BiasFixture:
    """Physics state of the whole bench; every public method takes `lock` and integrates first."""

    def __init__(self, clock, parts: Mapping[int, Callable[[PartTime], BenchPart]],
                 wiring: Wiring = Wiring(), temp_C: float = 25.0, channels: int = 16):
        self.clock = clock
        self.wiring = wiring
        self.lock = threading.RLock()
        self.n_channels = channels
        self._t = clock.now()
        self.chamber = ThermalChamber(clock, temp_C)
        self._slots: dict[int, _Slot] = {}
        for channel, make in sorted(parts.items()):
            if not 1 <= channel <= channels:
                raise FixtureError(f"channel {channel} outside 1 .. {channels}")
            time = PartTime(self._t, bool(getattr(clock, "virtual", False)))
            self._slots[channel] = _Slot(channel, make(time), time)
        self.set_V = 0.0
        self.limit_A = 0.01
        self.fault_limit_A: float | None = None
        self.output_on = False
        self.closed: int | None = None

    # ------------------------------------------------------------ queries

    def part(self, channel: int) -> BenchPart:
        if channel not in self._slots:
            raise FixtureError(f"no part on channel {channel}; the fixture has channels "
                               f"{sorted(self._slots)}")
        return self._slots[channel].part

    @property
    def channels(self) -> list[int]:
        return sorted(self._slots)

    def effective_limit_A(self) -> float:
        if self.fault_limit_A is None:
            return self.limit_A
        return min(self.limit_A, self.fault_limit_A)

    def part_voltage_V(self, channel: int) -> float:
        with self.lock:
            self.advance()
            return self._slots[channel].V if channel in self._slots else 0.0

    def terminal_V(self) -> float:
        """What the supply reads at its terminals: 0 when off, sagging when current-limited."""
        with self.lock:
            self.advance()
            if not self.output_on:
                return 0.0
            slot = self._connected()
            if slot is None:
                return self.set_V
            current = self._cc_current_A(slot.V)
            if current is None:
                return self.set_V
            return slot.V + current * self.wiring.feed_R_ohm

    def supply_current_A(self) -> float:
        """Charging plus leakage current through the feed resistor."""
        with self.lock:
            self.advance()
            slot = self._connected()
            if not self.output_on or slot is None:
                return 0.0
            current = self._cc_current_A(slot.V)
            if current is not None:
                return current
            return (self.set_V - slot.V) / self.wiring.feed_R_ohm

    def temp_C(self) -> float:
        """The parts' temperature (what the physics uses), degC."""
        with self.lock:
            return self.chamber.part_C()

    def fixture_temp_C(self) -> float:
        """The fixture's temperature (where the bench's thermometer sits), degC."""
        with self.lock:
            return self.chamber.fixture_C()

    def measure(self, freq_Hz: float, osc_level_Vrms: float):
        """One reading of whatever is on the closed channel through the fixture's residuals
        (instruments/sim/wideband.py): the part, the short position, or the open fixture."""
        from instruments.sim import wideband

        with self.lock:
            self.advance()
            slot = self._connected()
            temp_C = self.chamber.part_C(self._t)
            if slot is None:
                position = ("short" if self.closed is not None
                            and self.closed == self.wiring.short_channel else "open")
                return wideband.fixture_reading(self.wiring.residuals, position, freq_Hz,
                                                osc_level_Vrms, self.wiring.source_R_ohm, self._t)
            if not wideband.supports(slot.part):  # a stand-in part answers for itself
                return slot.part.measure(freq_Hz, osc_level_Vrms, temp_C,
                                         source_R_ohm=self.wiring.source_R_ohm)
            return wideband.measure(slot.part, freq_Hz, osc_level_Vrms, temp_C,
                                    self.wiring.source_R_ohm, self.wiring.residuals)

    def supply_state(self) -> dict:
        with self.lock:
            return {"set_V": self.set_V, "output_on": self.output_on,
                    "terminal_V": self.terminal_V()}

    # ------------------------------------------------------------ changes

    def set_voltage(self, V: float) -> None:
        with self.lock:
            self.advance()
            self.set_V = float(V)

    def set_current_limit(self, A: float) -> None:
        with self.lock:
            self.advance()
            self.limit_A = float(A)

    def set_fault_limit(self, A: float | None) -> None:
        with self.lock:
            self.advance()
            self.fault_limit_A = A

    def set_output(self, on: bool) -> None:
        with self.lock:
            self.advance()
            self.output_on = bool(on)

    def close_channel(self, channel: int) -> None:
        """Connect a channel; another one closed is a conflict (break before make)."""
        with self.lock:
            self.advance()
            if self.closed is not None and self.closed != channel:
                raise FixtureError(f"channel {self.closed} is closed; open it first")
            self.closed = channel

    def open_channel(self, channel: int) -> None:
        with self.lock:
            self.advance()
            if self.closed == channel:
                self.closed = None

    def open_all(self) -> None:
        with self.lock:
            self.advance()
            self.closed = None

    def set_temperature(self, temp_C: float) -> None:
        """Air, fixture and parts at temp_C at once (a test knob; the chamber ramps)."""
        with self.lock:
            self.advance()
            self.chamber.teleport(temp_C)

    def start_temp_drift(self, rate_C_per_min: float) -> None:
        with self.lock:
            self.advance()
            self.chamber.start_drift(rate_C_per_min)

    # ------------------------------------------------------------ integration

    def advance(self) -> None:
        """Integrate every part's voltage from the last call to clock.now()."""
        with self.lock:
            t_end = self.clock.now()
            if t_end <= self._t:
                return
            connected = self._connected()
            for slot in self._slots.values():
                if slot is connected:
                    self._integrate(slot, t_end, self._network_law)
                else:
                    self._integrate(slot, t_end, self._isolated_law)
                slot.time.t_s = t_end
            self._t = t_end

    def _connected(self) -> _Slot | None:
        return self._slots.get(self.closed) if self.closed is not None else None

    def _cc_current_A(self, V_part: float) -> float | None:
        """The limited current if the supply is in constant-current mode at this part voltage."""
        demand = (self.set_V - V_part) / self.wiring.feed_R_ohm
        limit = self.effective_limit_A()
        if abs(demand) > limit * (1 + 1e-9):  # tolerance: no chatter at the crossover
            return math.copysign(limit, demand)
        return None

    def _leak_G_S(self, part: BenchPart) -> float:
        return max(0.0, float(part.leakage_current_A(1.0)))

    def _network_law(self, slot: _Slot, V: float) -> "_Law":
        """How the part on the closed channel charges at voltage V.

        With a drive conductance G_d towards V_d the part obeys
        C dV/dt = G_d*(V_d - V) - G_leak*V, which relaxes to V_target = G_d*V_d/(G_d + G_leak)
        with total conductance G_d + G_leak. In constant current I it obeys
        C dV/dt = I - G_leak*V until V reaches the crossover back to constant voltage.
        """
        G_leak = self._leak_G_S(slot.part)
        if not self.output_on:
            G_d = 1.0 / (self.wiring.feed_R_ohm + self.wiring.bleed_R_ohm)
            return _Law(0.0, G_d + G_leak)
        current = self._cc_current_A(V)
        if current is not None:
            crossover_V = self.set_V - current * self.wiring.feed_R_ohm
            target = current / G_leak if G_leak > 0 else math.copysign(math.inf, current)
            return _Law(target, G_leak, crossover_V, current)
        G_d = 1.0 / self.wiring.feed_R_ohm
        return _Law(G_d * self.set_V / (G_d + G_leak), G_d + G_leak)

    def _isolated_law(self, slot: _Slot, V: float) -> "_Law":
        return _Law(0.0, self._leak_G_S(slot.part))

    def _integrate(self, slot: _Slot, t_end: float, law) -> None:
        """Exponential sub-steps (exact for constant C) with C taken at the step's midpoint.

        The part only tells C at its present voltage, so the midpoint value is extrapolated
        along the secant of the last two sub-steps (second order in the step size).
        """
        t, V = slot.time.t_s, slot.V
        for _ in range(MAX_STEPS_PER_ADVANCE):
            if t >= t_end:
                break
            step = law(slot, V)
            if step.crossover_V is None and (abs(step.target_V - V) <= SETTLE_V
                                             or step.G_S == 0):
                if step.G_S > 0:
                    V = step.target_V  # settled: within a microvolt of where it goes
                break  # nothing moves (e.g. an uncharged part on an open channel)
            slot.time.t_s = t
            C = slot.part.C_now_F(self.chamber.part_C(t))
            slope, max_dV = 0.0, MAX_DV_PER_STEP_V / 10  # no slope known: probe with a small step
            if slot.last_point is not None:
                V_prev, C_prev = slot.last_point
                if 1e-4 <= abs(V - V_prev) <= 5 * MAX_DV_PER_STEP_V:
                    slope, max_dV = (C - C_prev) / (V - V_prev), MAX_DV_PER_STEP_V
            slot.last_point = (V, C)
            result = _substep(step, V, C, t_end - t, max_dV)
            if result is None:
                t = t_end
                break
            if slope:
                C_mid = min(max(C + slope * (result[1] - V) / 2, 0.5 * C), 2.0 * C)
                result = _substep(step, V, C_mid, t_end - t, max_dV) or result
            dt, V, settled = result
            t = t_end if settled else t + dt
            if abs(V - slot.reported_V) >= REPORT_STEP_V:
                slot.time.t_s = t
                slot.part.set_bias(V)
                slot.reported_V = V
            if settled:
                break
        slot.V = V
        slot.time.t_s = t_end
