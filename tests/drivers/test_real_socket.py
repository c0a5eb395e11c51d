"""Through real pyvisa-py TCPIP SOCKET sessions to a toy instrument on 127.0.0.1 port 0.

These check what the fake cannot: that pyvisa-py really behaves as the session assumes
(pyvisa docs: termination and timeout attributes; a peer-closed socket shows up as a
timeout, then a failed write).
"""

from __future__ import annotations

import socket

import pytest

from instruments.drivers import InstrumentLinkError, LCRMeter, Reading


def _free_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


def test_open_set_query_measure_over_tcp(toy_server):
    toy, res = toy_server
    with LCRMeter(res, timeout_s=2.0) as m:
        assert m.idn == toy.idn
        m.freq_Hz = 1e4
        assert m.freq_Hz == 1e4
        assert m.measure() == Reading(1e-6, 1e-2, "CPD", False)
    assert toy.connections[0] == [
        "*IDN?", "*CLS", "SYSTem:ERRor?",
        "SOURce:FREQuency 10000", "SYSTem:ERRor?", "SOURce:FREQuency?",
        "FUNCtion?", "INITiate", "FETCh?"]


def test_a_reply_longer_than_one_read_chunk_is_read_whole(toy_server):
    # the session reads through pyvisa's low-level layer (visalib.read on the resource's
    # session); viRead returns success_max_count_read when the chunk filled before the
    # termination character (VISA viRead, pyvisa constants): the session must read on
    toy, res = toy_server
    with LCRMeter(res, timeout_s=2.0) as m:
        assert m.session._lib is not None          # the low-level path, not the resource's
        m.session._chunk = 3
        assert m.session.query("*IDN?") == toy.idn
        assert m.freq_Hz == 1000.0                 # and the next reply is in step
        m.session._chunk = 20 * 1024
        assert m.measure() == Reading(1e-6, 1e-2, "CPD", False)


def test_lower_case_resource_string_still_opens_a_socket_session(toy_server):
    toy, res = toy_server
    with LCRMeter(res.lower(), timeout_s=2.0) as m:
        assert m.function == "CPD"


def test_nothing_listening_gives_a_clear_link_error():
    # the connect is refused at once on loopback; pyvisa-py reports it on the first write
    res = f"TCPIP0::127.0.0.1::{_free_port()}::SOCKET"
    m = LCRMeter(res, timeout_s=1.0, open_timeout_s=2.0)
    with pytest.raises(InstrumentLinkError) as exc:
        m.open()
    msg = str(exc.value)
    assert msg.startswith(f"meter: cannot open '{res}': ")
    assert "refused" in msg and "check the address in the bench file" in msg
    assert not m.is_open


def test_serial_resource_that_does_not_exist_gives_a_link_error():
    m = LCRMeter("ASRL/dev/benchkit-no-such-port::INSTR", timeout_s=0.5)
    with pytest.raises(InstrumentLinkError, match="cannot open 'ASRL/dev/benchkit-no-such"):
        m.open()


def test_dropped_connection_is_reopened_and_settings_reapplied(toy_server):
    toy, res = toy_server
    with LCRMeter(res, timeout_s=0.3, backoff_s=0.01) as m:
        m.freq_Hz = 100.0
        m.function = "CSD"
        toy.drop_after = toy.total + 2          # the server closes on receiving FETCh?
        r = m.measure()
        assert r == Reading(1e-6, 1e-2, "CSD", False)
        assert m.session.counters["reconnects"] == 1
    assert len(toy.connections) == 2
    second = toy.connections[1]
    assert second[:2] == ["*IDN?", "*CLS"]
    assert second[2:6] == ["SOURce:FREQuency 100", "SYSTem:ERRor?", "FUNCtion CSD",
                           "SYSTem:ERRor?"]
    assert second[-2:] == ["INITiate", "FETCh?"]


def test_late_reply_over_tcp_is_discarded_and_the_stream_is_back_in_step(toy_server):
    toy, res = toy_server
    with LCRMeter(res, timeout_s=0.3, backoff_s=0.01) as m:
        m.ac_level_Vrms = 0.25
        toy.hold_reply_of = "SOURce:VOLTage?"   # its reply goes out only with the next line
        assert m.ac_level_Vrms == 0.25
        assert m.session.counters["timeouts"] == 1
        assert m.session.counters["stale_lines"] == 1
        assert m.function == "CPD"              # the next reply is its own, not a stale one
    assert toy.connections[0][-5:] == ["SOURce:VOLTage?", "*CLS", "*OPC?", "SOURce:VOLTage?",
                                       "FUNCtion?"]


def test_closing_one_driver_leaves_another_on_the_shared_manager_working(toy_server):
    # pyvisa returns one process-wide ResourceManager('@py'): a driver closes only its own
    # resource, never the manager
    toy, res = toy_server
    a = LCRMeter(res, timeout_s=2.0).open()
    b = LCRMeter(res, timeout_s=2.0, role="meter-b").open()
    try:
        a.close()
        assert b.function == "CPD"
    finally:
        b.close()
