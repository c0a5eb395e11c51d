"""Resource classes served by pyvisa-sim (a simulation backend for pyvisa, from the package
registry): a meter on GPIB, a supply on USB-TMC, a thermometer on a serial line and a scanner
over VXI-11 (TCPIP INSTR), each driven by a profile only, through the VISA library the caller
names ('<file>.yaml@sim', pyvisa-sim docs). pyvisa-py serves TCPIP SOCKET in the other tests.

Sources: pyvisa docs (read/write termination and timeout as resource attributes, serial
attributes baud_rate/data_bits/parity/stop_bits); IEEE 488.2 *IDN?; SCPI-1999 SYSTem:ERRor?.
"""

from __future__ import annotations

from pathlib import Path

import pytest

pytest.importorskip("pyvisa_sim")

from instruments.clock import VirtualClock  # noqa: E402
from instruments.drivers import BiasSupply, InstrumentError, LCRMeter, Scanner, Thermometer  # noqa: E402

HERE = Path(__file__).resolve().parent / "visa_sim"
LIB = f"{HERE / 'bench.yaml'}@sim"
METER, SUPPLY = "GPIB0::17::INSTR", "USB0::0x1234::0x5678::U0001::INSTR"
THERMO, SCANNER = "ASRL1::INSTR", "TCPIP0::192.168.0.30::inst0::INSTR"


def test_gpib_meter_by_profile_with_d_first_and_a_status_field():
    with LCRMeter(METER, profile=HERE / "meter.toml", visa_library=LIB) as m:
        assert m.idn.startswith("Brackwater Dynamics,BD-LCR-Y")
        m.function = "CSD"                      # sent as the profile's token CS-D
        assert m.function == "CSD"
        m.freq_Hz = 1.2e3                       # {value:.6E}: 1.200000E+03
        assert m.freq_Hz == 1200.0
        r = m.measure()
        assert (r.C_F, r.D, r.status) == (1.0e-5, 1.5e-2, "0")
        assert m.ac_dut_Vrms == 0.9
        res = m.session._res
        assert (res.read_termination, res.write_termination, res.timeout) == ("\n", "\n", 2000)
        m.session.write("OSCillator:SWEep ON")   # a header this meter does not know
        with pytest.raises(InstrumentError, match="-113"):
            m.check_errors()                    # its error queue, read as the profile says


def test_usb_supply_ramps_and_ends_at_0_v_output_off():
    clock = VirtualClock()
    s = BiasSupply(SUPPLY, profile=HERE / "supply.toml", visa_library=LIB)
    with s:
        s.current_limit_A = 0.01
        s.voltage_V = 0.0
        s.output_on = True
        steps = s.ramp_to(2.0, 1.0, clock)
        assert [v for _, v in steps] == [0.0, 0.5, 1.0, 1.5, 2.0]
        assert clock.now() >= 2.0              # 2 V at 1 V/s
        assert s.voltage_V == 2.0 and s.output_on is True
    # the with block ramps to 0 and switches off; reopen and look
    with BiasSupply(SUPPLY, profile=HERE / "supply.toml", visa_library=LIB) as again:
        assert again.voltage_V == 0.0 and again.output_on is False


def test_serial_thermometer_with_cr_lf_and_line_settings():
    with Thermometer(THERMO, profile=HERE / "thermometer.toml", visa_library=LIB) as t:
        assert t.temperature_C == 25.0
        res = t.session._res
        assert (res.read_termination, res.write_termination) == ("\r\n", "\r\n")
        assert res.baud_rate == 9600 and res.data_bits == 8


def test_vxi11_scanner():
    with Scanner(SCANNER, profile=HERE / "scanner.toml", visa_library=LIB) as sc:
        sc.select(1)
        assert sc.selected_channel == 1
        sc.open_all()
