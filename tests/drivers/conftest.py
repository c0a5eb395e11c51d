"""Fixtures for the driver tests: a tiny line-based SCPI instrument on 127.0.0.1 port 0.

It is not the simulated bench (instruments/sim/ is built separately); it answers just enough
of instruments/COMMANDS.md for the real pyvisa-py TCPIP SOCKET tests, and can drop the
connection or hold a reply back on purpose.
"""

from __future__ import annotations

import socketserver
import threading

import pytest


class ToyInstrument:
    """State shared by all connections; replies per COMMANDS.md (a subset)."""

    def __init__(self, idn: str = "Brackwater Dynamics,toy-meter,0001,0.1"):
        self.idn = idn
        self.lock = threading.Lock()
        self.values = {"FUNC": "CPD", "SOUR:FREQ": 1000.0, "SOUR:VOLT": 1.0}
        self.errors: list[str] = []
        self.connections: list[list[str]] = []   # commands received, per connection
        self.drop_after: int | None = None        # close after this many commands (once)
        self.hold_reply_of: str | None = None     # reply to this command only with the next
        self.total = 0

    def handle(self, line: str) -> str | None:
        cmd = line.strip()
        head, _, arg = cmd.partition(" ")
        h = head.upper()
        if h == "*IDN?":
            return self.idn
        if h in ("*CLS",):
            self.errors.clear()
            return None
        if h == "*OPC?":
            return "1"
        if h == "SYSTEM:ERROR?":
            return self.errors.pop(0) if self.errors else '0,"No error"'
        if h == "FUNCTION":
            if arg.upper() in ("CPD", "CSRS", "CSD"):
                self.values["FUNC"] = arg.upper()
            else:
                self.errors.append('-224,"Illegal parameter value"')
            return None
        if h == "FUNCTION?":
            return self.values["FUNC"]
        if h in ("SOURCE:FREQUENCY", "SOURCE:VOLTAGE"):
            key = "SOUR:FREQ" if "FREQ" in h else "SOUR:VOLT"
            self.values[key] = float(arg)
            return None
        if h in ("SOURCE:FREQUENCY?", "SOURCE:VOLTAGE?"):
            key = "SOUR:FREQ" if "FREQ" in h else "SOUR:VOLT"
            return f"{self.values[key]:.9E}"
        if h == "INITIATE":
            return None
        if h == "FETCH?":
            return "1.000000000E-06,1.000000000E-02"
        self.errors.append('-113,"Undefined header"')
        return None


class _Handler(socketserver.StreamRequestHandler):
    def handle(self) -> None:
        inst: ToyInstrument = self.server.instrument  # type: ignore[attr-defined]
        received: list[str] = []
        with inst.lock:
            inst.connections.append(received)
        held: str | None = None
        while True:
            raw = self.rfile.readline()
            if not raw:
                return
            line = raw.decode("ascii").rstrip("\r\n")
            with inst.lock:
                received.append(line)
                inst.total += 1
                if inst.drop_after is not None and inst.total >= inst.drop_after:
                    inst.drop_after = None
                    return                     # the server closes: a dropped link
                if held is not None:           # the late reply goes out before anything else
                    self.wfile.write(held.encode() + b"\n")
                    held = None
                reply = inst.handle(line)
                if reply is not None and inst.hold_reply_of == line:
                    inst.hold_reply_of = None
                    held = reply
                    continue
            if reply is not None:
                self.wfile.write(reply.encode("ascii") + b"\n")


class _Server(socketserver.ThreadingTCPServer):
    allow_reuse_address = True
    daemon_threads = True
    request_queue_size = 128   # the default of 5 stalled rapid reconnects (style notes)


@pytest.fixture
def toy_server():
    """(ToyInstrument, resource string) of a running toy instrument; stopped afterwards."""
    inst = ToyInstrument()
    srv = _Server(("127.0.0.1", 0), _Handler)
    srv.instrument = inst  # type: ignore[attr-defined]
    t = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
    t.start()
    port = srv.server_address[1]
    try:
        yield inst, f"TCPIP0::127.0.0.1::{port}::SOCKET"
    finally:
        srv.shutdown()
        srv.server_close()
