"""LCR meter: exact command/reply conversations (expected-protocol tests, no hardware).

Command spellings are those of instruments/COMMANDS.md; common commands per IEEE 488.2
(*IDN?, *CLS, *OPC?) and the error queue per SCPI-1999 (SYSTem:ERRor?, 0 = no error).
"""

from __future__ import annotations

import math

import pytest

from instruments.drivers import (InstrumentError, InvalidValueError, LCRMeter, Reading,
                                 load_profile)
from instruments.drivers.fake import DROP, FakeResourceManager, open_sequence

RES = "TCPIP0::fake-meter::5025::SOCKET"
OK = '0,"No error"'
ERR = "SYSTem:ERRor?"


def meter(protocol, **kw):
    rm = FakeResourceManager(open_sequence() + protocol)
    return LCRMeter(RES, rm=rm, backoff_s=0, **kw), rm


def test_open_checks_idn_clears_status_and_reads_errors():
    # IEEE 488.2: *IDN? identifies, *CLS clears the status; SCPI-1999: SYSTem:ERRor? queue
    m, rm = meter([])
    with m:
        assert m.idn == "Brackwater Dynamics,test-instrument,0001,0.1"
    assert rm.sent == ["*IDN?", "*CLS", ERR]
    rm.assert_done()


def test_open_sets_terminations_timeout_and_open_timeout():
    # pyvisa docs: read/write termination and timeout (ms) are resource attributes;
    # open_timeout (ms) is an argument of open_resource
    m, rm = meter([], timeout_s=1.5)
    with m:
        res = rm.current
        assert (res.read_termination, res.write_termination) == ("\n", "\n")
        assert res.timeout == 1500
    assert rm.opened == [(RES, {"open_timeout": 2000})]
    assert rm.closes == 1 and not rm.closed      # the resource, never the manager
    rm.assert_done()


@pytest.mark.parametrize("name, value, sent", [
    ("function", "CSRS", "FUNCtion CSRS"),
    ("function", "csd", "FUNCtion CSD"),          # case-insensitive, sent as listed
    ("freq_Hz", 1e3, "SOURce:FREQuency 1000"),
    ("freq_Hz", 20, "SOURce:FREQuency 20"),
    ("freq_Hz", 2e6, "SOURce:FREQuency 2000000"),
    ("ac_level_Vrms", 0.5, "SOURce:VOLTage 0.5"),
    ("ac_level_Vrms", 0.005, "SOURce:VOLTage 0.005"),
])
def test_each_setting_sends_its_command_then_reads_the_error_queue(name, value, sent):
    m, rm = meter([(sent, None), (ERR, OK)])
    with m:
        setattr(m, name, value)
        assert m.remembered[name] == (value.upper() if isinstance(value, str) else value)
    rm.assert_done()


@pytest.mark.parametrize("name, query, reply, expect", [
    ("function", "FUNCtion?", "CSRS", "CSRS"),
    ("function", "FUNCtion?", '"cpd"', "CPD"),
    ("freq_Hz", "SOURce:FREQuency?", "1.000000000E+03", 1000.0),
    ("ac_level_Vrms", "SOURce:VOLTage?", "1.000000000E+00", 1.0),
    ("ac_dut_Vrms", "MEASure:VOLTage:AC?", "9.876543210E-01", 0.987654321),
])
def test_each_setting_queries_and_parses(name, query, reply, expect):
    m, rm = meter([(query, reply)])
    with m:
        assert getattr(m, name) == expect
    rm.assert_done()


def test_ac_dut_is_read_only():
    m, rm = meter([])
    with m:
        with pytest.raises(AttributeError):
            m.ac_dut_Vrms = 1.0
    rm.assert_done()


@pytest.mark.parametrize("name, value", [
    ("freq_Hz", 19.999), ("freq_Hz", 10.5e6), ("ac_level_Vrms", 0.0), ("ac_level_Vrms", 2.5),
    ("function", "LS"), ("freq_Hz", math.nan), ("freq_Hz", math.inf),
])
def test_out_of_range_values_are_refused_before_anything_is_written(name, value):
    m, rm = meter([])
    with m:
        n = len(rm.sent)
        with pytest.raises(InvalidValueError):
            setattr(m, name, value)
        assert len(rm.sent) == n
    rm.assert_done()


def test_error_after_a_set_raises_naming_role_resource_command_and_is_not_remembered():
    m, rm = meter([("SOURce:FREQuency 1000", None), (ERR, '-222,"Data out of range"'),
                   (ERR, '-221,"Settings conflict"'), (ERR, OK)])
    with m:
        with pytest.raises(InstrumentError) as exc:
            m.freq_Hz = 1000.0
        msg = str(exc.value)
        assert "meter" in msg and RES in msg and "SOURce:FREQuency 1000" in msg
        assert exc.value.errors == ('-222,"Data out of range"', '-221,"Settings conflict"')
        assert "freq_Hz" not in m.remembered
    rm.assert_done()


def test_measure_init_then_fetch():
    m, rm = meter([("FUNCtion?", "CPD"), ("INITiate", None),
                   ("FETCh?", "4.700000000E-06,1.200000000E-02"),
                   ("INITiate", None), ("FETCh?", "4.690000000E-06,1.100000000E-02")])
    with m:
        r = m.measure()
        assert r == Reading(4.7e-6, 0.012, "CPD", False)
        assert (r.C_F, r.D) == (4.7e-6, 0.012) and math.isnan(r.Rs_ohm)
        assert m.measure().primary == 4.69e-6          # function known: not queried again
    rm.assert_done()


def test_measure_uses_the_function_it_set_and_rs_for_csrs():
    m, rm = meter([("FUNCtion CSRS", None), (ERR, OK), ("INITiate", None),
                   ("FETCh?", "1.0E-06,2.5E-02")])
    with m:
        m.function = "CSRS"
        r = m.measure()
        assert r.function == "CSRS" and r.Rs_ohm == 0.025 and math.isnan(r.D)
    rm.assert_done()


@pytest.mark.parametrize("reply", ["9.9E37,9.9E37", "9.900000000E+37,1.0E-02",
                                   "1.0E-06,9.91E37", "-9.9E37,0"])
def test_overload_is_flagged_and_never_a_number(reply):
    # SCPI-1999 vol. 1, 7.2.1.5: 9.9E37 is overrange (+/-), 9.91E37 is NaN
    m, rm = meter([("FUNCtion?", "CPD"), ("INITiate", None), ("FETCh?", reply)])
    with m:
        r = m.measure()
        assert r.overload and math.isnan(r.primary) and math.isnan(r.secondary)
    rm.assert_done()


def test_measure_with_a_read_profile(tmp_path):
    # a profile may say READ? (INITiate then FETCh? in one query, SCPI-1999 vol. 2 MEASure)
    base = load_profile("generic-lcr").source
    p = tmp_path / "read-lcr.toml"
    p.write_text(f'[profile]\nbase = "{base}"\nname = "read-lcr"\n[measure]\nmode = "read"\n')
    rm = FakeResourceManager(open_sequence() + [("FUNCtion?", "CSD"),
                                                ("READ?", "2.2E-07,3.0E-03")])
    with LCRMeter(RES, profile=p, rm=rm, backoff_s=0) as m:
        assert m.measure() == Reading(2.2e-7, 3e-3, "CSD", False)
    rm.assert_done()


def test_reconnect_reapplies_remembered_settings_in_order():
    m, rm = meter([
        ("FUNCtion CSD", None), (ERR, OK),
        ("SOURce:FREQuency 10000", None), (ERR, OK),
        ("SOURce:VOLTage 0.5", None), (ERR, OK),
        *open_sequence()[:3],                       # reopen: *IDN?, *CLS
        ("FUNCtion CSD", None), (ERR, OK),
        ("SOURce:FREQuency 10000", None), (ERR, OK),
        ("SOURce:VOLTage 0.5", None), (ERR, OK),
    ])
    with m:
        m.function, m.freq_Hz, m.ac_level_Vrms = "CSD", 1e4, 0.5
        m.reconnect()
        assert m.session.counters["reconnects"] == 1
    rm.assert_done()


def test_dropped_link_during_measure_reconnects_reapplies_and_measures_again():
    # pyvisa docs/common experience: a link closed by the instrument shows as a timeout;
    # after it, the write of the resynchronisation fails and the session reopens the link
    m, rm = meter([
        ("SOURce:FREQuency 100", None), (ERR, OK),
        ("FUNCtion?", "CPD"),
        ("INITiate", None), ("FETCh?", DROP),
        *open_sequence()[:3],
        ("SOURce:FREQuency 100", None), (ERR, OK),
        ("INITiate", None), ("FETCh?", "3.3E-06,2.0E-02"),
    ])
    with m:
        m.freq_Hz = 100.0
        assert m.measure() == Reading(3.3e-6, 0.02, "CPD", False)
        assert m.session.counters["reconnects"] == 1
        assert rm.dead_writes == ["*CLS"]         # the resync that found the link dead
    rm.assert_done()


def test_snapshot_queries_every_settable_setting():
    m, rm = meter([("FUNCtion?", "CPD"), ("SOURce:FREQuency?", "1.0E+03"),
                   ("SOURce:VOLTage?", "1.0E+00")])
    with m:
        assert m.snapshot() == {"function": "CPD", "freq_Hz": 1e3, "ac_level_Vrms": 1.0}
    rm.assert_done()


def test_a_function_only_read_back_is_read_again_after_a_reconnect():
    m, rm = meter([("FUNCtion?", "CPD"), ("INITiate", None), ("FETCh?", "1.0E-06,1.0E-02"),
                   *open_sequence()[:3],
                   ("FUNCtion?", "CSD"), ("INITiate", None), ("FETCh?", "1.0E-06,1.0E-02")])
    with m:
        assert m.measure().function == "CPD"
        m.reconnect()
        assert m.measure().function == "CSD"
    rm.assert_done()
