"""The simulated LCR meter (role `meter`): Cp-D, Cs-Rs or Cs-D of the part on the closed channel."""

from __future__ import annotations

import threading

from instruments.sim.fixture import BiasFixture
from instruments.sim.scpi import ScpiError, ScpiInstrument, format_float, parse_choice

FUNCTIONS = ("CPD", "CSRS", "CSD", "ZTD")  # ZTD: |Z| in ohm, theta in degrees
FREQ_RANGE_HZ = (20.0, 10e6)
LEVEL_RANGE_VRMS = (0.005, 2.0)
MEASUREMENT_TIME_S = 0.1
OVERLOAD = 9.9e37  # the value SCPI answers for an overrange reading (SCPI-1999, from memory)


class LCRMeterSim(ScpiInstrument):
    model = "SIM-LCR"
    role = "meter"

    def __init__(self, serial: str, fixture: BiasFixture):
        self.fixture = fixture
        self.overload_left = 0  # readings still to answer 9.9E37 (overload fault)
        self._overload_lock = threading.Lock()
        super().__init__(serial)

    def reset(self) -> None:
        self.function = "CPD"
        self.freq_Hz = 1e3
        self.ac_level_Vrms = 1.0
        self.last = None  # the last measurement (physics reading)

    def _register(self) -> None:
        add = self.commands.add
        add("[SENSe:]FUNCtion", set=self._set_function, query=lambda a: self.function)
        self.add_number("SOURce:FREQuency[:CW]", lambda: self.freq_Hz,
                        lambda v: setattr(self, "freq_Hz", v), *FREQ_RANGE_HZ, 1e3, "frequency")
        self.add_number("SOURce:VOLTage[:LEVel]", lambda: self.ac_level_Vrms,
                        lambda v: setattr(self, "ac_level_Vrms", v), *LEVEL_RANGE_VRMS, 1.0,
                        "AC level")
        add("INITiate[:IMMediate]", set=lambda a: self._initiate(), set_args=(0, 0))
        add("FETCh", query=lambda a: self._fetch())
        add("READ", query=lambda a: self._read())
        add("MEASure:VOLTage:AC", query=lambda a: self._ac_level())

    def arm_overload(self, count: int) -> None:
        with self._overload_lock:
            self.overload_left += count

    def _set_function(self, args: list[str]) -> None:
        self.function = parse_choice(args[0], FUNCTIONS, "function")

    def _initiate(self) -> None:
        # The measurement takes its time on the bench clock; the part is read at its end.
        self.fixture.clock.sleep(MEASUREMENT_TIME_S)
        self.last = self.fixture.measure(self.freq_Hz, self.ac_level_Vrms)

    def _read(self) -> str:
        """READ? = INITiate, then FETCh? (COMMANDS.md)."""
        self._initiate()
        return self._fetch()

    def _fetch(self) -> str:
        if self.last is None:
            raise ScpiError(-221, "nothing measured yet; send INITiate first")
        with self._overload_lock:
            if self.overload_left > 0:
                self.overload_left -= 1
                return f"{format_float(OVERLOAD)},{format_float(OVERLOAD)}"
        m = self.last
        primary, secondary = {
            "CPD": (m.Cp_F, m.D),
            "CSRS": (m.Cs_F, m.Rs_ohm),
            "CSD": (m.Cs_F, m.D),
            "ZTD": (getattr(m, "Z_abs_ohm", None), getattr(m, "theta_deg", None)),
        }[self.function]
        return f"{format_float(primary)},{format_float(secondary)}"

    def _ac_level(self) -> str:
        if self.last is None:
            raise ScpiError(-221, "nothing measured yet; send INITiate first")
        return format_float(self.last.ac_dut_Vrms)
