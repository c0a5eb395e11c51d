"""Every command of instruments/COMMANDS.md, answered by the simulated bench through pyvisa.

Sources: COMMANDS.md for the ranges and reset values (our own published command set, built on
SCPI-1999 roots); SCPI-1999 vol. 2 ch. 21 for the error codes; IEEE 488.2-1992 for *RST.
"""

from __future__ import annotations

import pytest


@pytest.fixture(scope="module")
def inst(rm, bench):
    opened = {role: rm.open_resource(res, read_termination="\n", write_termination="\n",
                                     timeout=3000, open_timeout=3000)
              for role, res in bench.resources.items()}
    yield opened
    for res in opened.values():
        res.close()


@pytest.fixture(autouse=True)
def reset_all(inst):
    for res in inst.values():
        res.write("*RST;*CLS")
    for res in inst.values():  # writes to different instruments are not ordered: sync each
        assert res.query("*OPC?") == "1"
    yield
    # no test may leave an error behind that it did not look at
    for role, res in inst.items():
        assert res.query("SYST:ERR?") == '0,"No error"', role


def drain(res):
    codes = []
    while True:
        code = int(res.query("SYST:ERR?").split(",")[0])
        if code == 0:
            return codes
        codes.append(code)


# --- meter ----------------------------------------------------------------------------------

@pytest.mark.parametrize("header", ["FUNC", "FUNCtion", "SENS:FUNC", "SENSe:FUNCtion"])
@pytest.mark.parametrize("function", ["CPD", "CSRS", "CSD", "cpd", "CsRs"])
def test_meter_function_round_trip(inst, header, function):
    # COMMANDS.md: [SENSe:]FUNCtion CPD|CSRS|CSD, answered in upper case
    m = inst["meter"]
    m.write(f"{header} {function}")
    assert m.query(f"{header}?") == function.upper()


def test_meter_function_reset_and_bad_value(inst):
    # COMMANDS.md reset CPD; SCPI-1999 vol. 2, 21.8.10: -224 Illegal parameter value
    m = inst["meter"]
    assert m.query("FUNC?") == "CPD"
    m.write("FUNC LSRS")
    assert drain(m) == [-224]
    assert m.query("FUNC?") == "CPD"


@pytest.mark.parametrize("header", ["SOUR:FREQ", "SOURce:FREQuency", "SOUR:FREQ:CW",
                                    "source:frequency:cw"])
@pytest.mark.parametrize("value", ["20", "120", "1E3", "1.0e+04", "2E6", "MIN", "MAX"])
def test_meter_frequency_round_trip(inst, header, value):
    # COMMANDS.md: SOURce:FREQuency[:CW] 20 .. 2E6, answered %.9E
    m = inst["meter"]
    m.write(f"{header} {value}")
    expected = {"MIN": 20.0, "MAX": 10e6}.get(value, None) or float(value)
    reply = m.query(f"{header}?")
    assert float(reply) == expected
    assert reply == f"{expected:.9E}"


@pytest.mark.parametrize("value", ["0.005", "0.5", "1", "2.0", "MIN", "MAX"])
def test_meter_level_round_trip(inst, value):
    # COMMANDS.md: SOURce:VOLTage[:LEVel] 0.005 .. 2.0 Vrms
    m = inst["meter"]
    m.write(f"SOUR:VOLT:LEV {value}")
    expected = {"MIN": 0.005, "MAX": 2.0}.get(value, None) or float(value)
    assert float(m.query("SOURce:VOLTage?")) == expected


@pytest.mark.parametrize("command", ["SOUR:FREQ 19.9", "SOUR:FREQ 10.5E6", "SOUR:VOLT 0.004",
                                     "SOUR:VOLT 2.5", "SOUR:VOLT -1"])
def test_meter_out_of_range_is_222_and_keeps_the_setting(inst, command):
    # SCPI-1999 vol. 2, 21.8.10: -222 Data out of range; the old value stays
    m = inst["meter"]
    m.write(command)
    assert drain(m) == [-222]
    assert float(m.query("SOUR:FREQ?")) == 1e3
    assert float(m.query("SOUR:VOLT?")) == 1.0


def test_meter_fetch_before_any_measurement_is_221(inst):
    # COMMANDS.md: FETCh? with nothing measured yet -> -221 Settings conflict
    m = inst["meter"]
    m.write("FETC?")
    m.write("MEAS:VOLT:AC?")
    assert drain(m) == [-221, -221]


def test_meter_measures_at_the_clock_and_answers_two_floats(inst, bench):
    # COMMANDS.md: INITiate takes 0.1 s of clock time; FETCh?/READ? answer
    # <primary>,<secondary> in %.9E; MEASure:VOLTage:AC? the level across the part
    m, sc = inst["meter"], inst["scanner"]
    sc.write("ROUT:CLOS (@1)")
    assert sc.query("*OPC?") == "1"  # writes to another instrument are not ordered: sync
    t0 = bench.clock.now()
    m.write("INIT")
    assert m.query("*OPC?") == "1"
    assert bench.clock.now() - t0 == pytest.approx(0.1)
    fetched = m.query("FETC?")
    primary, secondary = (float(x) for x in fetched.split(","))
    assert fetched == f"{primary:.9E},{secondary:.9E}"
    assert 1e-6 < primary < 20e-6   # a 10 uF part at 0 V (data/parts.toml, BD-1001)
    assert 0 < secondary < 0.2
    assert m.query("FETC?") == fetched  # FETCh? does not measure again
    read = m.query("READ?")
    assert bench.clock.now() - t0 == pytest.approx(0.2)
    assert read != fetched           # a new (noisy) reading
    assert 0 < float(m.query("MEAS:VOLT:AC?")) < 1.0


def test_meter_functions_report_the_matching_quantities(inst):
    # handbook relations: D = w*Cs*Rs and Cp = Cs/(1 + D^2) (impedance measurement handbook)
    import math

    m, sc = inst["meter"], inst["scanner"]
    sc.write("ROUT:CLOS (@2)")
    assert sc.query("*OPC?") == "1"
    m.write("INIT")
    m.write("FUNC CSRS")
    Cs, Rs = (float(x) for x in m.query("FETC?").split(","))
    m.write("FUNC CSD")
    Cs2, D = (float(x) for x in m.query("FETC?").split(","))
    m.write("FUNC CPD")
    Cp, D2 = (float(x) for x in m.query("FETC?").split(","))
    assert Cs2 == Cs and D2 == D
    assert D == pytest.approx(2 * math.pi * 1e3 * Cs * Rs, rel=1e-6)
    assert Cp == pytest.approx(Cs / (1 + D * D), rel=1e-6)


def test_meter_open_fixture_reads_only_stray_capacitance(inst):
    # common practice: with no part connected the meter sees picofarads of stray capacitance
    m = inst["meter"]
    Cp, _D = (float(x) for x in m.query("READ?").split(","))
    assert 0 < Cp < 100e-12


def test_meter_rst_restores_reset_values(inst):
    # COMMANDS.md / IEEE 488.2 10.32: *RST -> CPD, 1 kHz, 1 Vrms
    m = inst["meter"]
    m.write("FUNC CSD;:SOUR:FREQ 120;:SOUR:VOLT 0.5")
    assert (m.query("FUNC?"), float(m.query("SOUR:FREQ?")), float(m.query("SOUR:VOLT?"))) \
        == ("CSD", 120.0, 0.5)
    m.write("*RST")
    assert (m.query("FUNC?"), float(m.query("SOUR:FREQ?")), float(m.query("SOUR:VOLT?"))) \
        == ("CPD", 1e3, 1.0)


# --- supply ---------------------------------------------------------------------------------

@pytest.mark.parametrize("header", ["VOLT", "SOUR:VOLT", "SOURce:VOLTage:LEVel:IMMediate:AMPLitude",
                                    "VOLT:LEV", "VOLT:IMM:AMPL", "volt:ampl"])
@pytest.mark.parametrize("value", ["-60", "-1.5", "0", "3.3", "60", "MIN", "MAX"])
def test_supply_voltage_round_trip(inst, header, value):
    # COMMANDS.md: [SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude] -60 .. 60 V
    s = inst["supply"]
    s.write(f"{header} {value}")
    expected = {"MIN": -60.0, "MAX": 60.0}.get(value, None)
    expected = float(value) if expected is None else expected
    assert float(s.query(f"{header}?")) == expected


@pytest.mark.parametrize("value", ["0.0001", "0.01", "0.5", "1", "MIN", "MAX"])
def test_supply_current_limit_round_trip(inst, value):
    # COMMANDS.md: [SOURce:]CURRent[...] 0.0001 .. 1.0 A, reset 0.01
    s = inst["supply"]
    assert float(s.query("CURR?")) == 0.01
    s.write(f"SOUR:CURR:LEV:IMM:AMPL {value}")
    expected = {"MIN": 0.0001, "MAX": 1.0}.get(value, None) or float(value)
    assert float(s.query("CURRent?")) == expected


@pytest.mark.parametrize("command", ["VOLT 60.1", "VOLT -61", "CURR 0", "CURR 1.5",
                                     "CURR 0.00001"])
def test_supply_out_of_range_is_222(inst, command):
    # SCPI-1999 vol. 2, 21.8.10: -222 Data out of range
    s = inst["supply"]
    s.write(command)
    assert drain(s) == [-222]
    assert float(s.query("VOLT?")) == 0.0
    assert float(s.query("CURR?")) == 0.01


@pytest.mark.parametrize("word,answer", [("ON", "1"), ("OFF", "0"), ("1", "1"), ("0", "0"),
                                         ("on", "1")])
def test_supply_output_round_trip(inst, word, answer):
    # COMMANDS.md: OUTPut[:STATe] ON|OFF|1|0, answered 1|0
    s = inst["supply"]
    s.write(f"OUTP:STAT {word}")
    assert s.query("OUTPut?") == answer


def test_supply_rst_is_zero_volts_output_off(inst, bench):
    # COMMANDS.md: *RST -> 0 V, output off, 0.01 A
    s = inst["supply"]
    s.write("VOLT 5;CURR 0.2;OUTP ON")
    assert s.query("*OPC?") == "1"  # a write is not waited for: sync before the oracle
    assert bench.supply_state()["output_on"] is True
    s.write("*RST")
    assert (float(s.query("VOLT?")), float(s.query("CURR?")), s.query("OUTP?")) == (0.0, 0.01, "0")
    assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


def test_supply_measure_forms(inst):
    # COMMANDS.md: MEASure[:SCALar]:VOLTage[:DC]? and MEASure[:SCALar]:CURRent[:DC]?
    s = inst["supply"]
    s.write("VOLT 2.5;OUTP ON")
    for header in ("MEAS:VOLT?", "MEASure:SCALar:VOLTage:DC?", "meas:volt:dc?"):
        assert float(s.query(header)) == 2.5   # no channel closed: no load
    for header in ("MEAS:CURR?", "MEAS:SCAL:CURR:DC?"):
        assert float(s.query(header)) == 0.0


# --- scanner --------------------------------------------------------------------------------

def test_scanner_close_open_round_trip(inst, bench):
    # COMMANDS.md: ROUTe:CLOSe (@n), ROUTe:CLOSe? answers 1/0 per listed channel
    sc = inst["scanner"]
    assert sc.query("ROUT:CLOS? (@1:4)") == "0,0,0,0"
    sc.write("ROUT:CLOS (@3)")
    assert sc.query("ROUTe:CLOSe? (@1:4)") == "0,0,1,0"
    assert sc.query("ROUT:CLOS? (@3)") == "1"
    assert bench.fixture.closed == 3
    sc.write("ROUT:OPEN (@3)")
    assert sc.query("ROUT:CLOS? (@1,3,16)") == "0,0,0"


@pytest.mark.parametrize("open_command", ["ROUT:OPEN (@2)", "ROUT:OPEN (@1,2)", "ROUT:OPEN (@1:4)",
                                          "ROUT:OPEN:ALL", "ROUTe:OPEN:ALL", "*RST"])
def test_scanner_open_forms(inst, open_command):
    # COMMANDS.md: ROUTe:OPEN (@n) | (@n,m) | (@n:m), ROUTe:OPEN:ALL, *RST = all open
    sc = inst["scanner"]
    sc.write("ROUT:CLOS (@2)")
    sc.write(open_command)
    assert sc.query("ROUT:CLOS? (@1:16)") == ",".join(["0"] * 16)


def test_scanner_break_before_make(inst):
    # COMMANDS.md: closing a channel while another is closed -> -221 Settings conflict
    sc = inst["scanner"]
    sc.write("ROUT:CLOS (@1)")
    sc.write("ROUT:CLOS (@2)")
    sc.write("ROUT:CLOS (@3,4)")
    assert drain(sc) == [-221, -221]
    assert sc.query("ROUT:CLOS? (@1:4)") == "1,0,0,0"
    sc.write("ROUT:CLOS (@1)")  # closing the closed channel again is no conflict
    assert drain(sc) == []


@pytest.mark.parametrize("command,code", [("ROUT:CLOS (@17)", -222), ("ROUT:CLOS 3", -104),
                                          ("ROUT:CLOS", -109), ("ROUT:CLOS? ", -109),
                                          ("ROUT:OPEN:ALL 1", -108)])
def test_scanner_bad_lists(inst, command, code):
    # SCPI-1999 vol. 2, 21.8: -222 out of range, -104 data type, -109 missing, -108 not allowed
    sc = inst["scanner"]
    sc.write(command)
    assert drain(sc) == [code]


# --- thermometer ----------------------------------------------------------------------------

def test_thermometer_reads_the_chamber(inst, bench):
    # common practice: a fixture thermometer reads the chamber within its noise (0.02 degC here)
    t = inst["thermometer"]
    readings = [float(t.query("MEAS:TEMP?")) for _ in range(5)]
    assert all(abs(r - 25.0) < 0.2 for r in readings)
    assert len(set(readings)) > 1   # noisy, not a constant
    bench.set_temperature(85.0)
    try:
        assert abs(float(t.query("MEASure:TEMPerature?")) - 85.0) < 0.2
    finally:
        bench.set_temperature(25.0)


# --- errors through the link ----------------------------------------------------------------

@pytest.mark.parametrize("role,command,code", [
    ("meter", "FOO:BAR 1", -113), ("supply", "VOLTS 1", -113),      # -113 Undefined header
    ("meter", "SOUR:FREQ 0", -222), ("supply", "VOLT 100", -222),   # -222 Data out of range
    ("meter", "SOUR:FREQ", -109), ("supply", "OUTP", -109),         # -109 Missing parameter
    ("meter", 'SOUR:FREQ "1e3', -102), ("scanner", "ROUT:CLOS\x01 (@1)", -102),  # -102 Syntax
    ("thermometer", "MEAS:TEMP? 1", -108), ("meter", "INIT 5", -108),   # -108 not allowed
    ("supply", "VOLT five", -104), ("meter", "SOUR:FREQ 1e3 Hz", -104),  # -104 Data type
])
def test_error_queue_after_bad_commands(inst, role, command, code):
    # SCPI-1999 vol. 2, 21.8: the code of each error class, one entry per bad command
    res = inst[role]
    res.write(command)
    assert drain(res) == [code]


def test_esr_after_errors_through_the_link(inst):
    # IEEE 488.2 11.5.1.1: command error sets bit 5 (32), execution error bit 4 (16)
    m = inst["meter"]
    m.write("FOO")
    m.write("SOUR:FREQ 0")
    assert int(m.query("*ESR?")) == 48
    assert int(m.query("*ESR?")) == 0
    drain(m)
