"""The simulated temperature chamber (role `chamber`): set point, ramp rate, air, state.

The thermal physics lives in instruments/sim/thermal.py (shared with the fixture, whose parts
and thermometer follow the same chamber); this module is only its SCPI face.
"""

from __future__ import annotations

from instruments.sim.scpi import ScpiError, ScpiInstrument, format_float
from instruments.sim.thermal import ThermalChamber

SETPOINT_RANGE_C = (-70.0, 180.0)
RATE_RANGE_C_PER_S = (0.001, 0.5)
RESET_SETPOINT_C = 25.0
RESET_RATE_C_PER_S = 0.05
STATE_TOKENS = {"RAMP": "RAMP", "SETTLE": "SETT", "STABLE": "STAB"}


class ChamberSim(ScpiInstrument):
    model = "SIM-CHAMBER"
    role = "chamber"

    def __init__(self, serial: str, thermal: ThermalChamber):
        self.thermal = thermal
        self.refusals = 0          # set points still to refuse (fault `refuse`)
        target, rate = thermal.target_C, thermal.rate_C_per_s
        super().__init__(serial)   # runs reset(); the bench starts where it was built
        thermal.set_rate(rate)
        thermal.set_target(target)

    def reset(self) -> None:
        # *RST: set point 25 degC, rate 0.05 degC/s (COMMANDS.md)
        self.thermal.set_rate(RESET_RATE_C_PER_S)
        self.thermal.set_target(RESET_SETPOINT_C)

    def arm_refusal(self, count: int) -> None:
        self.refusals += count

    def _set_point(self, value: float) -> None:
        if self.refusals > 0:
            self.refusals -= 1
            raise ScpiError(-221, "chamber refuses the set point (interlock)")
        self.thermal.set_target(value)

    def _register(self) -> None:
        th = self.thermal
        self.add_number("[SOURce:]TEMPerature[:SETPoint]", lambda: th.target_C, self._set_point,
                        *SETPOINT_RANGE_C, RESET_SETPOINT_C, "set point")
        self.add_number("[SOURce:]TEMPerature:RATE", lambda: th.rate_C_per_s, th.set_rate,
                        *RATE_RANGE_C_PER_S, RESET_RATE_C_PER_S, "ramp rate")
        self.commands.add("MEASure:TEMPerature", query=lambda a: format_float(th.air_C()))
        self.commands.add("STATus:TEMPerature", query=lambda a: STATE_TOKENS[th.state()])
