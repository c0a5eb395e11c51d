"""The simulated thermometer (role `thermometer`): the fixture's temperature plus a little noise.

It sits on the fixture, not on the part: after a temperature step the part lags behind it.
"""

from __future__ import annotations

import numpy as np

from instruments.sim.fixture import BiasFixture
from instruments.sim.scpi import ScpiInstrument, format_float

NOISE_C = 0.02  # standard deviation of a reading, degC (invented, a good RTD readout)


class ThermometerSim(ScpiInstrument):
    model = "SIM-THERMO"
    role = "thermometer"

    def __init__(self, serial: str, fixture: BiasFixture, rng: np.random.Generator):
        self.fixture = fixture
        self.rng = rng
        super().__init__(serial)

    def _register(self) -> None:
        self.commands.add("MEASure:TEMPerature", query=lambda a: format_float(self._read()))

    def _read(self) -> float:
        return self.fixture.fixture_temp_C() + float(self.rng.normal(0.0, NOISE_C))
