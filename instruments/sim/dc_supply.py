"""The simulated DC bias supply (role `supply`): programmed voltage, current limit, output."""

from __future__ import annotations

from instruments.sim.fixture import BiasFixture
from instruments.sim.scpi import ScpiInstrument, format_bool, format_float, parse_bool

VOLTAGE_RANGE_V = (-60.0, 60.0)
CURRENT_RANGE_A = (0.0001, 1.0)
RESET_LIMIT_A = 0.01


class DCSupplySim(ScpiInstrument):
    model = "SIM-DCS"
    role = "supply"

    def __init__(self, serial: str, fixture: BiasFixture):
        self.fixture = fixture
        super().__init__(serial)

    def reset(self) -> None:
        # *RST: 0 V, output off, reset current limit (COMMANDS.md)
        self.fixture.set_output(False)
        self.fixture.set_voltage(0.0)
        self.fixture.set_current_limit(RESET_LIMIT_A)

    def _register(self) -> None:
        f = self.fixture
        self.add_number("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", lambda: f.set_V,
                        f.set_voltage, *VOLTAGE_RANGE_V, 0.0, "voltage")
        self.add_number("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", lambda: f.limit_A,
                        f.set_current_limit, *CURRENT_RANGE_A, RESET_LIMIT_A, "current limit")
        self.commands.add("OUTPut[:STATe]", set=lambda a: f.set_output(parse_bool(a[0], "output")),
                          query=lambda a: format_bool(f.output_on))
        self.commands.add("MEASure[:SCALar]:VOLTage[:DC]",
                          query=lambda a: format_float(f.terminal_V()))
        self.commands.add("MEASure[:SCALar]:CURRent[:DC]",
                          query=lambda a: format_float(f.supply_current_A()))
