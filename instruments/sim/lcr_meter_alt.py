"""The simulated LCR meter in its second dialect ("alt"), chosen when the bench starts.

Why a second dialect: a profile must be able to drive a meter that spells everything
differently, answers with a status field, holds the level across the part (automatic level
control) and carries its own DC bias source. The commands are in instruments/COMMANDS.md,
section "LCR meter, alt dialect"; the generic profiles do not speak it, so a test can reach
it through a profile of its own only.

The internal bias drives the same fixture node the external supply would (the bench file
names no supply then); its current limit is the source's own, fixed.
"""

from __future__ import annotations

import math

from instruments.sim.lcr_meter import OVERLOAD, LCRMeterSim
from instruments.sim.physics import level_across_part_Vrms
from instruments.sim.scpi import ScpiError, format_bool, format_float, parse_bool, parse_choice

ALT_FUNCTIONS = {"CP-D": "CPD", "CS-D": "CSD", "CS-RS": "CSRS"}
ALT_FREQ_RANGE_HZ = (20.0, 1e6)
ALT_LEVEL_RANGE_VRMS = (0.01, 5.0)       # the setting: open-circuit, or across the part (ALC)
ALT_OSC_MAX_VRMS = 10.0                  # what the source can give with level control on
ALT_BIAS_RANGE_V = (-40.0, 40.0)
ALT_BIAS_LIMIT_A = 0.02                  # the internal bias source's own current limit
ALC_ITERATIONS = 4
STATUS_OK, STATUS_OVERLOAD = "0", "1"


class LCRMeterAltSim(LCRMeterSim):
    model = "SIM-LCR-ALT"

    def reset(self) -> None:
        super().reset()
        self.level_control = False
        self.osc_Vrms = self.ac_level_Vrms     # what the source gives, after level control
        if hasattr(self, "fixture"):
            self.fixture.set_output(False)
            self.fixture.set_voltage(0.0)

    def _register(self) -> None:
        add = self.commands.add
        f = self.fixture
        names = {v: k for k, v in ALT_FUNCTIONS.items()}
        add("CONFigure:FUNCtion", set=self._set_alt_function,
            query=lambda a: names[self.function])
        self.add_number("SIGNal:FREQuency[:CW]", lambda: self.freq_Hz,
                        lambda v: setattr(self, "freq_Hz", v), *ALT_FREQ_RANGE_HZ, 1e3,
                        "frequency")
        self.add_number("SIGNal:LEVel[:AMPLitude]", lambda: self.ac_level_Vrms,
                        lambda v: setattr(self, "ac_level_Vrms", v), *ALT_LEVEL_RANGE_VRMS,
                        1.0, "AC level")
        add("SIGNal:LEVel:CONTrol[:STATe]",
            set=lambda a: setattr(self, "level_control", parse_bool(a[0], "level control")),
            query=lambda a: format_bool(self.level_control))
        add("SIGNal:LEVel:MONitor", query=lambda a: self._ac_level())
        self.add_number("BIAS:VOLTage[:LEVel]", lambda: f.set_V, f.set_voltage,
                        *ALT_BIAS_RANGE_V, 0.0, "bias voltage")
        add("BIAS:STATe", set=lambda a: self._set_bias_state(parse_bool(a[0], "bias state")),
            query=lambda a: format_bool(f.output_on))
        add("BIAS:MONitor:VOLTage", query=lambda a: format_float(f.terminal_V()))
        add("BIAS:MONitor:CURRent", query=lambda a: format_float(f.supply_current_A()))
        add("TRIGger[:IMMediate]", set=lambda a: self._initiate(), set_args=(0, 0))
        add("DATA:FETCh", query=lambda a: self._fetch())

    def _set_alt_function(self, args: list[str]) -> None:
        self.function = ALT_FUNCTIONS[parse_choice(args[0], list(ALT_FUNCTIONS), "function")]

    def _set_bias_state(self, on: bool) -> None:
        if on:
            self.fixture.set_current_limit(ALT_BIAS_LIMIT_A)
        self.fixture.set_output(on)

    def _initiate(self) -> None:
        """Measure; with level control, move the source until the level across the part is
        the setting (V_dut = V_osc*|Zx|/|R_src + Zx|, science.md section 3), within the
        source's maximum: a part of too low an impedance is left below the setting."""
        self.fixture.clock.sleep(0.1)
        osc = self.ac_level_Vrms
        m = self.fixture.measure(self.freq_Hz, osc)
        if self.level_control:
            R = self.fixture.wiring.source_R_ohm
            for _ in range(ALC_ITERATIONS):
                w = 2.0 * math.pi * m.freq_Hz
                Z = complex(m.Rs_ohm, -1.0 / (w * m.Cs_F)) if m.Cs_F > 0 else complex(1e12, 0)
                per_volt = level_across_part_Vrms(1.0, Z, R)
                osc = min(ALT_OSC_MAX_VRMS, self.ac_level_Vrms / per_volt)
                m = self.fixture.measure(self.freq_Hz, osc)
        self.osc_Vrms = osc
        self.last = m

    def _fetch(self) -> str:
        if self.last is None:
            raise ScpiError(-221, "nothing measured yet; send TRIGger first")
        with self._overload_lock:
            if self.overload_left > 0:
                self.overload_left -= 1
                return f"{format_float(OVERLOAD)},{format_float(OVERLOAD)},{STATUS_OVERLOAD}"
        m = self.last
        primary, secondary = {
            "CPD": (m.Cp_F, m.D),
            "CSRS": (m.Cs_F, m.Rs_ohm),
            "CSD": (m.Cs_F, m.D),
        }[self.function]
        return f"{format_float(primary)},{format_float(secondary)},{STATUS_OK}"
