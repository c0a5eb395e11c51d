"""An independent SCPI LCR meter for the tests: its own parser, its own spellings, its own truth.

It is not the simulated bench's meter (instruments/sim/ shares no code with it): it answers a
command set of its own (long forms, another function command, another trigger and fetch),
lays its readings out as asked (`C,D,status` or `D,C`), and computes them from a truth of its
own, a Landau-type bias law C(V) = C0*(1 + (V/V_k)^2)^(-1/3) [published: Landau-Devonshire
description of a ferroelectric's permittivity under field, from memory], at the DC voltage the
simulated bench's supply has put across the closed channel (read through the bench's oracle,
as a real meter sees whatever bias is on the part).

Commands (SCPI rules: short form = the upper-case letters, or the long form, any case):
  *IDN? *CLS *OPC? *RST  SYSTem:ERRor:NEXT?
  MODE:IMPedance CPD|CSD|CSRS / ?      OSCillator:FREQuency <Hz> / ?
  OSCillator:AMPLitude <Vrms> / ?      MEASure:STARt      MEASure:RESult?
  MEASure:LEVel?  (level across the part: V_osc*|Zx|/|R_src + Zx|, R_src = 100 ohm)
"""

from __future__ import annotations

import math
import re
import socketserver
import threading
from dataclasses import dataclass, field
from typing import Callable

R_SRC_OHM = 100.0   # source resistance, typical [published: LCR meter manuals, generally]


def _word_regex(long: str) -> str:
    short = re.match(r"^[A-Z*]*", long).group(0)
    return f"(?:{re.escape(short)}|{re.escape(long.upper())})"


def _header_regex(spec: str) -> re.Pattern:
    return re.compile("^" + ":".join(_word_regex(w) for w in spec.split(":")) + "$", re.I)


@dataclass
class LandauTruth:
    """C(V) = C0*(1 + (V/V_k)^2)^(-1/3); D constant; both what the meter 'sees'."""

    C0_F: float
    V_k_V: float
    D: float = 0.012

    def C_F(self, V: float) -> float:
        return self.C0_F * (1.0 + (V / self.V_k_V) ** 2) ** (-1.0 / 3.0)


@dataclass
class IndependentMeter:
    truth: LandauTruth
    bias_V: Callable[[], float]            # DC across the part now
    layout: str = "C,D,status"             # or "D,C"
    noise_frac: float = 2e-4
    seed: int = 7
    function: str = "CPD"
    freq_Hz: float = 1e3
    level_Vrms: float = 1.0
    errors: list = field(default_factory=list)
    last: tuple | None = None
    lock: threading.Lock = field(default_factory=threading.Lock)

    def __post_init__(self):
        import random
        self._rng = random.Random(self.seed)
        self._table = [
            ("*IDN?", lambda a: "Brackwater Dynamics,BD-IM-1,IM0001,0.1"),
            ("*CLS", lambda a: self.errors.clear()),
            ("*OPC?", lambda a: "1"),
            ("*RST", lambda a: self._reset()),
            ("SYSTem:ERRor:NEXT?", lambda a: self.errors.pop(0) if self.errors else '+0,"No error"'),
            ("MODE:IMPedance", self._set_mode),
            ("MODE:IMPedance?", lambda a: self.function),
            ("OSCillator:FREQuency", lambda a: self._set_num("freq_Hz", a, 20, 1e6)),
            ("OSCillator:FREQuency?", lambda a: f"{self.freq_Hz:.6E}"),
            ("OSCillator:AMPLitude", lambda a: self._set_num("level_Vrms", a, 0.01, 2.0)),
            ("OSCillator:AMPLitude?", lambda a: f"{self.level_Vrms:.6E}"),
            ("MEASure:STARt", lambda a: self._start()),
            ("MEASure:RESult?", lambda a: self._result()),
            ("MEASure:LEVel?", lambda a: self._level()),
        ]
        self._table = [(_header_regex(h.rstrip("?")), h.endswith("?"), f)
                       for h, f in self._table]

    def _reset(self):
        self.function, self.freq_Hz, self.level_Vrms, self.last = "CPD", 1e3, 1.0, None

    def _set_mode(self, arg):
        if arg.upper() in ("CPD", "CSD", "CSRS"):
            self.function = arg.upper()
        else:
            self.errors.append('-224,"Illegal parameter value"')

    def _set_num(self, name, arg, lo, hi):
        try:
            v = float(arg)
        except ValueError:
            self.errors.append('-104,"Data type error"')
            return
        if not lo <= v <= hi:
            self.errors.append('-222,"Data out of range"')
            return
        setattr(self, name, v)

    def _start(self):
        V = self.bias_V()
        Cs = self.truth.C_F(V) * (1.0 + self.noise_frac * self._rng.gauss(0, 1))
        D = self.truth.D * (1.0 + 0.01 * self._rng.gauss(0, 1))
        self.last = (Cs, D)

    def _impedance(self) -> complex:
        Cs, D = self.last
        w = 2 * math.pi * self.freq_Hz
        return complex(D / (w * Cs), -1.0 / (w * Cs))

    def _result(self):
        if self.last is None:
            self.errors.append('-221,"Settings conflict"')
            return "9.9E37,9.9E37,1" if self.layout.endswith("status") else "9.9E37,9.9E37"
        Cs, D = self.last
        w = 2 * math.pi * self.freq_Hz
        # handbook relations: Cp = Cs/(1 + D^2), Rs = D/(w Cs)
        primary = Cs / (1 + D * D) if self.function == "CPD" else Cs
        secondary = D / (w * Cs) if self.function == "CSRS" else D
        if self.layout == "D,C":
            return f"{secondary:.6E},{primary:.6E}"
        return f"{primary:.6E},{secondary:.6E},+0"

    def _level(self):
        if self.last is None:
            return "0.000000E+00"
        Z = self._impedance()
        return f"{self.level_Vrms * abs(Z) / abs(R_SRC_OHM + Z):.6E}"

    def handle(self, line: str) -> str | None:
        head, _, arg = line.strip().partition(" ")
        query = head.endswith("?")
        name = head.rstrip("?").lstrip(":")
        with self.lock:
            for rx, is_q, fn in self._table:
                if is_q == query and rx.match(name):
                    out = fn(arg.strip())
                    return out if query else None
            self.errors.append('-113,"Undefined header"')
        return None


class _Handler(socketserver.StreamRequestHandler):
    def handle(self) -> None:
        meter: IndependentMeter = self.server.meter  # type: ignore[attr-defined]
        while True:
            raw = self.rfile.readline()
            if not raw:
                return
            reply = meter.handle(raw.decode("ascii", "replace").rstrip("\r\n"))
            if reply is not None:
                self.wfile.write(reply.encode("ascii") + b"\n")


class _Server(socketserver.ThreadingTCPServer):
    allow_reuse_address = True
    daemon_threads = True
    request_queue_size = 128


class MeterServer:
    """Serve an IndependentMeter on 127.0.0.1 (a free port); a context manager."""

    def __init__(self, meter: IndependentMeter):
        self.meter = meter
        self._srv = _Server(("127.0.0.1", 0), _Handler)
        self._srv.meter = meter  # type: ignore[attr-defined]
        self._thread = threading.Thread(target=self._srv.serve_forever,
                                        kwargs={"poll_interval": 0.05}, daemon=True)

    @property
    def resource(self) -> str:
        return f"TCPIP0::127.0.0.1::{self._srv.server_address[1]}::SOCKET"

    def __enter__(self) -> "MeterServer":
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._srv.shutdown()
        self._srv.server_close()
        self._thread.join(timeout=2)


PROFILE_HEAD = '''[profile]
name = "independent-meter"
kind = "lcr-meter"
description = "The tests' independent SCPI meter"

[link]
read_termination = "\\n"
write_termination = "\\n"
timeout_s = 2.0

[common]
next_error = "SYSTem:ERRor:NEXT?"

[measure]
mode = "init-fetch"
trigger = "MEASure:STARt"
fetch = "MEASure:RESult?"

[setting.function]
type = "enum"
query = "MODE:IMPedance?"
set = "MODE:IMPedance {value}"
values = ["CPD", "CSD", "CSRS"]

[setting.freq_Hz]
type = "float"
query = "OSCillator:FREQuency?"
set = "OSCillator:FREQuency {value:.6E}"
min = 20.0
max = 1.0e6

[setting.ac_level_Vrms]
type = "float"
query = "OSCillator:AMPLitude?"
set = "OSCillator:AMPLitude {value:.6E}"
min = 0.01
max = 2.0

[setting.ac_dut_Vrms]
type = "float"
query = "MEASure:LEVel?"
read_only = true
'''

REPLY_STATUS = '''
[measure.reply]
fields = ["primary", "secondary", "status"]
status_ok = ["+0", "0"]
'''

REPLY_D_FIRST = '''
[measure.reply]
fields = ["secondary", "primary"]
'''
