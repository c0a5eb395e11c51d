"""Session behaviour on a faulty link, with the expected-protocol fake.

The recovery recipe follows the pyvisa docs' advice on timeouts and terminations (a
timed-out query leaves its reply behind; clear the input before trusting the next reply)
and IEEE 488.2 *CLS / *OPC? (answers 1 once everything before it is done).
"""

from __future__ import annotations

import pytest

from instruments.drivers import (InstrumentError, InstrumentLinkError, InstrumentTimeout,
                                 LCRMeter, UnsafeCommandError, normalise_resource)
from instruments.drivers.fake import (DROP, TIMEOUT, FakeResourceManager, Late,
                                      ProtocolMismatch, open_sequence)

RES = "TCPIP0::fake-meter::5025::SOCKET"
IDN = "Brackwater Dynamics,test-instrument,0001,0.1"
OK = '0,"No error"'


def meter(protocol, **kw):
    rm = FakeResourceManager(open_sequence() + protocol)
    kw.setdefault("backoff_s", 0)
    return LCRMeter(RES, rm=rm, **kw), rm


def test_late_reply_after_a_timeout_is_discarded_not_returned():
    # the reply to the first query arrives late, while the session resynchronises:
    # it must be thrown away, and the retried query answered by its own reply
    m, rm = meter([("SOURce:FREQuency?", Late("1.000000000E+03")),
                   ("*CLS", None), ("*OPC?", "1"),
                   ("SOURce:FREQuency?", "2.000000000E+03")])
    with m:
        assert m.freq_Hz == 2000.0
        assert m.session.counters["timeouts"] == 1
        assert m.session.counters["stale_lines"] == 1
        assert "1.000000000E+03" in rm.replies        # it was read, and discarded
    rm.assert_done()


def test_a_stale_one_before_the_opc_reply_is_drained_too():
    # a late '1' (e.g. OUTPut? on another instrument kind) would pass for the *OPC? reply;
    # the short drain after it catches the real '1'
    m, rm = meter([("FUNCtion?", Late("1")), ("*CLS", None), ("*OPC?", "1"),
                   ("FUNCtion?", "CSD")])
    with m:
        assert m.function == "CSD"
        assert m.session.counters["stale_lines"] == 1
    rm.assert_done()


def test_garbled_reply_leads_to_resync_and_retry():
    m, rm = meter([("SOURce:VOLTage?", "1.0E+0\x7f#"), ("*CLS", None), ("*OPC?", "1"),
                   ("SOURce:VOLTage?", "1.000000000E+00")])
    with m:
        assert m.ac_level_Vrms == 1.0
        assert m.session.counters["garbled"] == 1
    rm.assert_done()


def test_repeated_timeouts_raise_instrument_timeout_with_a_useful_message():
    # resync fails too -> possible disconnect -> reconnect -> still no reply -> give up
    m, rm = meter([("SOURce:FREQuency?", TIMEOUT), ("*CLS", None), ("*OPC?", TIMEOUT),
                   *open_sequence()[:3], ("SOURce:FREQuency?", TIMEOUT)],
                  retries=1, reconnects=1, timeout_s=0.5)
    with m:
        with pytest.raises(InstrumentTimeout) as exc:
            m.freq_Hz
    msg = str(exc.value)
    assert "meter" in msg and RES in msg and "SOURce:FREQuency?" in msg
    assert "check" in msg and "read termination (LF)" in msg
    assert exc.value.command == "SOURce:FREQuency?"
    rm.assert_done()


def test_reconnect_gives_up_after_the_bounded_number_of_attempts():
    refused = ConnectionRefusedError(111, "Connection refused")
    m, rm = meter([("FUNCtion?", DROP), ("@open", refused), ("@open", refused),
                   ("@open", refused)], retries=2, reconnects=3)
    with m:
        with pytest.raises(InstrumentLinkError) as exc:
            m.function
    msg = str(exc.value)
    assert "could not reopen it in 3 attempt(s)" in msg and "Connection refused" in msg
    assert m.session.counters["reconnect_failures"] == 1
    rm.assert_done()


def test_reconnect_refuses_a_different_instrument():
    m, rm = meter([("@open", None), ("*IDN?", "Brackwater Dynamics,other,0002,0.1"),
                   ("*CLS", None)])
    with m:
        with pytest.raises(InstrumentLinkError, match="answers as"):
            m.reconnect()
    rm.assert_done()


def test_reconnect_retries_when_reapplying_settings_fails():
    m, rm = meter([("SOURce:FREQuency 500", None), ("SYSTem:ERRor?", OK),
                   *open_sequence()[:3], ("SOURce:FREQuency 500", DROP),
                   *open_sequence()[:3], ("SOURce:FREQuency 500", None),
                   ("SYSTem:ERRor?", OK)])
    with m:
        m.freq_Hz = 500.0
        m.reconnect()
        assert m.session.counters["reconnects"] == 1
    rm.assert_done()


@pytest.mark.parametrize("idn_reply", ["", "just-a-name", "maker,model", ",model,sn,fw"])
def test_open_refuses_an_answer_that_is_not_an_identification(idn_reply):
    # IEEE 488.2 10.14: *IDN? answers four fields: maker, model, serial, firmware
    rm = FakeResourceManager([("@open", None), ("*IDN?", idn_reply)])
    m = LCRMeter(RES, rm=rm, backoff_s=0)
    with pytest.raises(InstrumentLinkError, match="IEEE 488.2 identification"):
        m.open()
    assert rm.closes == 1 and not m.is_open        # the resource it opened, closed again
    rm.assert_done()


def test_open_with_no_answer_to_idn_names_what_to_check():
    rm = FakeResourceManager([("@open", None), ("*IDN?", TIMEOUT)])
    m = LCRMeter(RES, rm=rm, backoff_s=0, timeout_s=0.2)
    with pytest.raises(InstrumentLinkError) as exc:
        m.open()
    msg = str(exc.value)
    assert "no answer to '*IDN?' within 0.2 s" in msg and "SCPI port" in msg
    assert rm.closes == 1
    rm.assert_done()


def test_open_failure_from_the_backend_names_the_resource_and_what_to_check():
    rm = FakeResourceManager([("@open", OSError("could not connect: timeout"))])
    m = LCRMeter(RES, rm=rm, backoff_s=0)
    with pytest.raises(InstrumentLinkError) as exc:
        m.open()
    assert str(exc.value) == (f"meter: cannot open '{RES}': could not connect: timeout; check "
                              "the address in the bench file and that the instrument is on")
    rm.assert_done()


def test_error_queue_reported_at_open_fails_the_open():
    rm = FakeResourceManager(open_sequence(errors='-350,"Queue overflow"')
                             + [("SYSTem:ERRor?", OK)])
    m = LCRMeter(RES, rm=rm, backoff_s=0)
    with pytest.raises(InstrumentError, match="Queue overflow"):
        m.open()
    assert not m.is_open
    rm.assert_done()


@pytest.mark.parametrize("resource", ["", "garbage", "TCPIP0::1.2.3::", None, 5025,
                                      "TCPIP0::host::5025::SOCKET;*RST"])
def test_bad_resource_strings_give_a_link_error_naming_the_address(resource):
    with pytest.raises(InstrumentLinkError) as exc:
        LCRMeter(resource, rm=FakeResourceManager([]))
    msg = str(exc.value)
    assert msg.startswith("meter: cannot open") and "check the address" in msg


def test_resource_strings_are_normalised_where_visa_defines_upper_case():
    # pyvisa: a lower-case resource class does not parse as a socket (style notes)
    assert normalise_resource("tcpip0::127.0.0.1::5025::socket") == \
        "TCPIP0::127.0.0.1::5025::SOCKET"
    assert normalise_resource("asrl/dev/ttyUSB0::instr") == "ASRL/dev/ttyUSB0::INSTR"
    assert normalise_resource("TCPIP0::MyHost::inst0::INSTR") == "TCPIP0::MyHost::inst0::INSTR"
    assert normalise_resource("gpib0::7::instr") == "GPIB0::7::INSTR"


def test_serial_settings_from_the_profile_are_applied_to_serial_resources(tmp_path):
    from instruments.drivers import load_profile
    base = load_profile("generic-thermometer").source
    p = tmp_path / "serial-thermo.toml"
    p.write_text(f'[profile]\nbase = "{base}"\nname = "serial-thermo"\n'
                 '[link]\nbaud_rate = 9600\ndata_bits = 8\nparity = "none"\nstop_bits = 1\n'
                 'read_termination = "\\r\\n"\nwrite_termination = "\\r\\n"\n')
    from instruments.drivers import Thermometer
    rm = FakeResourceManager(open_sequence())
    with Thermometer("ASRL/dev/ttyUSB0::INSTR", profile=p, rm=rm, backoff_s=0):
        res = rm.current
        assert res.baud_rate == 9600 and res.data_bits == 8
        assert res.read_termination == "\r\n" and res.write_termination == "\r\n"
    rm.assert_done()


def test_commands_with_separators_or_newlines_never_reach_the_wire():
    m, rm = meter([])
    with m:
        for bad in ("*RST;OUTP ON", "FUNC CPD\nOUTP ON", "FUNC\rCPD", "FUNC CPD\x00", ""):
            with pytest.raises(UnsafeCommandError):
                m.session.write(bad)
            with pytest.raises(UnsafeCommandError):
                m.session.query(bad)
        assert rm.sent == ["*IDN?", "*CLS", "SYSTem:ERRor?"]
    rm.assert_done()


def test_not_open_is_a_clear_error_not_a_crash():
    m, rm = meter([])
    with pytest.raises(InstrumentLinkError, match="not open"):
        m.freq_Hz
    with pytest.raises(InstrumentLinkError, match="not open"):
        m.freq_Hz = 1e3


def test_the_fake_itself_catches_an_unexpected_command():
    # guard: the expected-protocol helper must not let a wrong command pass
    m, rm = meter([("FUNCtion CPD", None)])
    with m:
        with pytest.raises(ProtocolMismatch):
            m.session.write("FUNCtion CSD")
    with pytest.raises(AssertionError, match="expected 'FUNCtion CPD'"):
        rm.assert_done()


def test_the_fake_itself_catches_leftovers():
    m, rm = meter([("FUNCtion?", ["CPD", "extra"])])
    with m:
        m.function
    with pytest.raises(AssertionError, match="left over"):
        rm.assert_done()


@pytest.mark.parametrize("reply", ['0,"No e#~', "0,No error", "garbage", '0,"a"b"'])
def test_a_garbled_error_queue_reply_is_not_taken_for_no_error(reply):
    # SCPI-1999 vol. 2, SYSTem:ERRor: <code>,"<quoted description>"
    m, rm = meter([("SYSTem:ERRor?", reply), ("*CLS", None), ("*OPC?", "1"),
                   ("SYSTem:ERRor?", '-222,"Data out of range"'), ("SYSTem:ERRor?", OK)])
    with m:
        with pytest.raises(InstrumentError, match="-222"):
            m.check_errors()
    rm.assert_done()
