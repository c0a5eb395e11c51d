"""The TCP transport of the simulated bench, through pyvisa-py and through raw sockets.

Sources: IEEE 488.2-1992 (identification, message terminators), SCPI-1999 vol. 2 ch. 21
(error -102), the pyvisa socket pitfalls in the project's style notes (`common practice`).
"""

from __future__ import annotations

import os
import socket
import threading

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from instruments.clock import VirtualClock
from instruments.sim import SimBench, SimBenchError
from instruments.sim.bench import ROLE_ORDER
from benchkit.commands.sim import demo_bench

MODELS = {"meter": "SIM-LCR", "supply": "SIM-DCS", "scanner": "SIM-MUX", "chamber": "SIM-CHAMBER",
          "thermometer": "SIM-THERMO"}


@pytest.fixture(autouse=True)
def clean_queues(bench):
    for inst in bench.instruments.values():
        inst.errors.clear()


def open_res(rm, resource, timeout_ms=3000):
    # pyvisa needs the read and write termination and an upper-case resource string
    # (common practice, project style notes)
    return rm.open_resource(resource, read_termination="\n", write_termination="\n",
                            timeout=timeout_ms, open_timeout=3000)


def address(resource):
    _, host, port, _ = resource.split("::")
    return host, int(port)


def raw_connection(resource):
    sock = socket.create_connection(address(resource), timeout=3)
    return sock


def read_line(sock):
    data = b""
    while not data.endswith(b"\n"):
        chunk = sock.recv(4096)
        if not chunk:
            break
        data += chunk
    return data.decode("ascii").rstrip("\n")


def test_idn_of_every_instrument(rm, bench):
    # IEEE 488.2 10.14: *IDN? answers maker, model, serial, firmware
    for role in ROLE_ORDER:
        res = open_res(rm, bench.resources[role])
        try:
            maker, model, serial, firmware = res.query("*IDN?").split(",")
        finally:
            res.close()
        assert maker == "benchkit-sim"
        assert model == MODELS[role]
        assert serial and firmware


def test_resource_strings_are_upper_case_socket_resources(bench):
    # common practice (pyvisa): TCPIP0::host::port::SOCKET, upper case
    for role, resource in bench.resources.items():
        board, host, port, kind = resource.split("::")
        assert (board, host, kind) == ("TCPIP0", "127.0.0.1", "SOCKET")
        assert 0 < int(port) < 65536


def test_garbage_bytes_then_correct_answers(rm, bench):
    # SCPI-1999 vol. 2, 21.8.9: bytes that are no valid program message are -102 Syntax error;
    # common practice: the instrument keeps answering the next valid message.
    res = open_res(rm, bench.resources["meter"])
    try:
        res.write_raw(b"\xff\xfe\x00\x81junk\x07\n")   # binary garbage
        res.write_raw(b"SOUR:FREQ \xc3\x28\n")         # invalid UTF-8
        res.write_raw(b"\x00\x00\x00\n")
        assert res.query("*IDN?").startswith("benchkit-sim,SIM-LCR,")
        codes = [res.query("SYST:ERR?").split(",")[0] for _ in range(4)]
        assert codes == ["-102", "-102", "-102", "0"]
        assert float(res.query("SOUR:FREQ?")) == 1e3
    finally:
        res.close()


def test_very_long_line_is_rejected_without_hanging(rm, bench):
    # common practice: an input buffer overflow is reported (-102 here) and the link stays usable
    sock = raw_connection(bench.resources["supply"])
    try:
        sock.sendall(b"VOLT " + b"1" * 200_000 + b"\n")
        sock.sendall(b"*IDN?\n")
        assert read_line(sock).startswith("benchkit-sim,SIM-DCS,")
        sock.sendall(b"SYST:ERR?\n")
        reply = read_line(sock)
        assert reply.startswith('-102,"Syntax error; message longer than')
        sock.sendall(b"VOLT?\n")
        assert float(read_line(sock)) == 0.0
    finally:
        sock.close()


def test_carriage_return_before_newline_is_ignored(bench):
    # IEEE 488.2 7.5 (from memory) / COMMANDS.md: "\r\n" terminated messages work too
    sock = raw_connection(bench.resources["thermometer"])
    try:
        sock.sendall(b"*IDN?\r\n")
        assert read_line(sock).startswith("benchkit-sim,SIM-THERMO,")
    finally:
        sock.close()


def test_client_that_disconnects_mid_line(rm, bench):
    # common practice: a half-sent message of a vanished client is never executed
    sock = raw_connection(bench.resources["meter"])
    sock.sendall(b"SOUR:FREQ 5")
    sock.close()
    res = open_res(rm, bench.resources["meter"])
    try:
        assert float(res.query("SOUR:FREQ?")) == 1e3
        assert res.query("SYST:ERR?") == '0,"No error"'
    finally:
        res.close()


def test_second_client_after_the_first_drops(rm, bench):
    # common practice: the instrument accepts a new connection after a client vanished,
    # and keeps its settings
    first = open_res(rm, bench.resources["meter"])
    first.write("SOUR:FREQ 120")
    assert float(first.query("SOUR:FREQ?")) == 120.0
    sock = raw_connection(bench.resources["meter"])
    sock.sendall(b"*IDN?\n")
    sock.shutdown(socket.SHUT_RDWR)   # abrupt end, reply unread
    sock.close()
    first.close()
    second = open_res(rm, bench.resources["meter"])
    try:
        assert float(second.query("SOUR:FREQ?")) == 120.0
        second.write("*RST")
        assert float(second.query("SOUR:FREQ?")) == 1e3
    finally:
        second.close()


def test_concurrent_clients_on_every_instrument(rm, bench):
    # common practice: one parser per instrument, clients served side by side
    failures = []

    def hammer(role):
        res = open_res(rm, bench.resources[role])
        try:
            for _ in range(40):
                if not res.query("*IDN?").startswith(f"benchkit-sim,{MODELS[role]},"):
                    failures.append(role)
        except Exception as exc:  # noqa: BLE001 - collected for the assertion
            failures.append(f"{role}: {exc}")
        finally:
            res.close()

    threads = [threading.Thread(target=hammer, args=(role,)) for role in ROLE_ORDER * 2]
    for t in threads:
        t.start()
    for t in threads:
        t.join(30)
    assert failures == []


def test_rapid_reconnects_are_all_served(rm, bench):
    # common practice (style notes): a listen backlog of 128 serves rapid reconnects
    for _ in range(60):
        res = open_res(rm, bench.resources["scanner"])
        try:
            assert res.query("*OPC?") == "1"
        finally:
            res.close()


def test_handler_failure_becomes_a_queued_error_not_a_dead_server(rm, bench, monkeypatch):
    # common practice: an internal failure is reported as a device-specific error (-300)
    # and the instrument keeps serving
    def broken():
        raise RuntimeError("simulated bug")

    monkeypatch.setattr(bench.thermometer, "_read", broken)
    res = open_res(rm, bench.resources["thermometer"], timeout_ms=500)
    try:
        res.write("MEAS:TEMP?")
        assert res.query("SYST:ERR?").startswith("-300,")
        assert res.query("*IDN?").startswith("benchkit-sim,SIM-THERMO,")
    finally:
        res.close()


def test_stop_closes_client_connections_and_ports():
    # common practice: a stopped server closes its clients and no longer listens
    b = demo_bench(clock=VirtualClock()).start()
    resource = b.resources["meter"]
    sock = raw_connection(resource)
    sock.sendall(b"*IDN?\n")
    assert read_line(sock).startswith("benchkit-sim,")
    b.stop()
    sock.settimeout(3)
    try:
        assert sock.recv(100) == b""
    except ConnectionResetError:
        pass
    finally:
        sock.close()
    with pytest.raises(OSError):
        socket.create_connection(address(resource), timeout=3).close()


def _open_fds():
    return len(os.listdir("/proc/self/fd"))


@pytest.mark.skipif(not os.path.isdir("/proc/self/fd"), reason="needs /proc (Linux)")
def test_many_benches_leak_no_threads_or_sockets():
    # common practice: servers started and stopped in a test session leave nothing behind,
    # even while their clients are still connected (stop() must close those connections)
    def cycle():
        with demo_bench(clock=VirtualClock()) as b:
            sock = raw_connection(b.resources["supply"])
            sock.sendall(b"*IDN?\n")
            read_line(sock)
        return sock

    clients = [cycle()]  # warm up lazy imports and caches
    threads, fds = threading.active_count(), _open_fds()
    for _ in range(12):
        clients.append(cycle())
    assert threading.active_count() == threads
    assert _open_fds() == fds + 12   # only the test's own client sockets remain
    for sock in clients:
        assert sock.recv(10) == b""  # closed by the server
        sock.close()


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.binary(min_size=1, max_size=3000))
def test_random_bytes_over_the_link_never_stop_the_answers(bench, data):
    # common practice: whatever a client sends, the next valid message is answered
    sock = raw_connection(bench.resources["meter"])
    try:
        sock.sendall(data + b"\n*CLS;*IDN?\n")
        reply = read_line(sock)
        while not reply.startswith("benchkit-sim,SIM-LCR,"):   # replies the garbage earned
            reply = read_line(sock)
            assert reply, "connection closed"
    finally:
        sock.close()


def _free_base_port():
    """A base port whose next four ports are free too (a few tries; None if unlucky)."""
    for _ in range(10):
        probe = socket.socket()
        probe.bind(("127.0.0.1", 0))
        base = probe.getsockname()[1]
        probe.close()
        if base > 65531:
            continue
        socks = []
        try:
            for offset in range(5):
                s = socket.socket()
                s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
                socks.append(s)
                s.bind(("127.0.0.1", base + offset))
            return base
        except OSError:
            continue
        finally:
            for s in socks:
                s.close()
    return None


def test_base_port_layout_and_port_in_use():
    # contract section 2: base_port N -> meter N, supply N+1, scanner N+2, thermometer N+3,
    # chamber N+4;
    # a port in use is one clear error and leaves nothing open
    base = _free_base_port()
    if base is None:
        pytest.skip("no five consecutive free ports found")
    with demo_bench(clock=VirtualClock(), base_port=base) as first:
        assert [address(first.resources[r])[1] for r in ROLE_ORDER] == [base + i for i in range(len(ROLE_ORDER))]
        threads = threading.active_count()
        second = demo_bench(clock=VirtualClock(), base_port=base)
        with pytest.raises(SimBenchError, match=f"cannot listen on 127.0.0.1:{base} for the meter"):
            second.start()
        assert not second.running
        assert threading.active_count() == threads
        sock = raw_connection(first.resources["meter"])
        sock.sendall(b"*IDN?\n")
        assert read_line(sock).startswith("benchkit-sim,SIM-LCR,")
        sock.close()
