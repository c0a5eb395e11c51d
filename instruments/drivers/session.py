"""One VISA session to one instrument, made robust against the usual link faults.

The pitfalls this guards against (see the pyvisa docs on terminations and timeouts):
a missing read termination turns every read into a timeout; a timed-out query leaves its late
reply in the input for the next read; a link closed by the instrument shows up as a timeout,
not as an error; a failed connect can leak a socket. So the session always sets both
terminations, the I/O timeout and the open timeout; after any timeout it throws away what is
waiting and resynchronises with *CLS then *OPC? (discarding every line before the '1') before
trusting another reply; when resynchronising fails too it treats the link as dropped and
reopens it a bounded number of times, checking that the same instrument answers *IDN?.

It closes only what it opened: the resource always, the ResourceManager never (a passed one
belongs to the caller, and pyvisa hands every caller of ResourceManager('@py') the same
process-wide manager, so closing it would close the other instruments' sessions too).
pyvisa-py's ``clear()`` is not used: on a socket the peer has closed it loops forever.
"""

from __future__ import annotations

import collections
import re
import time
from typing import Any, Callable

import pyvisa
import pyvisa.rname
from pyvisa import constants
from pyvisa.errors import VisaIOError

from .errors import InstrumentError, InstrumentLinkError, InstrumentTimeout, InvalidValueError
from .profile import COMMON_DEFAULTS, TERMINATIONS, check_command_text

_RESOURCE_CLASSES = {"INSTR", "SOCKET", "RAW", "INTFC", "BACKPLANE", "SERVANT"}
_INTERFACES = {"TCPIP", "GPIB", "USB", "ASRL", "VXI", "PXI", "VICP"}

_PARITY = {"none": constants.Parity.none, "odd": constants.Parity.odd,
           "even": constants.Parity.even, "mark": constants.Parity.mark,
           "space": constants.Parity.space}
_STOP_BITS = {1: constants.StopBits.one, 1.5: constants.StopBits.one_and_a_half,
              2: constants.StopBits.two}


DEFAULT_VISA_LIBRARY = "@py"   # pyvisa-py: pure Python, no vendor VISA needed


def resource_manager(visa_library: str = DEFAULT_VISA_LIBRARY) -> Any:
    """The ResourceManager of a VISA library; a session never closes it.

    `visa_library` is what pyvisa.ResourceManager takes: '@py' (pyvisa-py), '@ivi' (the
    vendor VISA installed on the machine, e.g. for GPIB and USB adapters), a path to a VISA
    shared library, or 'file.yaml@sim' (pyvisa-sim). pyvisa hands every caller of one
    library the same process-wide manager.
    """
    return pyvisa.ResourceManager(visa_library)


class _Timeout(Exception):
    """Internal: no complete reply in time."""


class _LinkDown(Exception):
    """Internal: the link refused an operation (closed, reset, invalid session)."""


def normalise_resource(resource: str) -> str:
    """Upper-case the interface prefix and resource class of a VISA resource string.

    pyvisa parses 'tcpip0::host::5025::socket' as something else than a socket (it then
    rejects read_termination), so the parts VISA defines in upper case are upper-cased; the
    host name and serial device paths are left as written.
    """
    parts = resource.strip().split("::")
    m = re.match(r"^([A-Za-z]+)(.*)$", parts[0])
    if m and m.group(1).upper() in _INTERFACES:
        parts[0] = m.group(1).upper() + m.group(2)
    if len(parts) > 1 and parts[-1].upper() in _RESOURCE_CLASSES:
        parts[-1] = parts[-1].upper()
    return "::".join(parts)


def _term_name(term: str) -> str:
    return TERMINATIONS.get(term, repr(term))


class Session:
    """A VISA session with bounded retries, resynchronisation and reconnection.

    `on_reconnect` is called after the link has been reopened (and *IDN? matched) so that the
    driver can re-apply what it remembers; inside it every operation is tried once.
    """

    def __init__(self, resource: str, *, role: str, read_termination: str = "\n",
                 write_termination: str = "\n", timeout_s: float = 5.0,
                 open_timeout_s: float = 2.0, rm: Any = None, retries: int = 2,
                 reconnects: int = 2, backoff_s: float = 0.05, drain_timeout_s: float = 0.05,
                 max_stale_lines: int = 50, serial: dict | None = None,
                 common: dict[str, str] | None = None,
                 on_reconnect: Callable[[], None] | None = None,
                 sleep: Callable[[float], None] = time.sleep,
                 visa_library: str | None = None):
        self.role = role
        if not isinstance(resource, str) or not resource.strip():
            raise InstrumentLinkError(
                f"{role}: cannot open {resource!r}: not a VISA resource string; check the "
                "address in the bench file (e.g. 'TCPIP0::192.168.0.10::5025::SOCKET')",
                role=role, resource=str(resource))
        self.resource = normalise_resource(resource)
        self._where_text = f"{role} ({self.resource})"
        try:
            parsed = pyvisa.rname.parse_resource_name(self.resource)
        except Exception as exc:  # pyvisa.rname.InvalidResourceName and friends
            raise InstrumentLinkError(
                f"{role}: cannot open {resource!r}: not a valid VISA resource string ({exc}); "
                "check the address in the bench file (e.g. 'TCPIP0::192.168.0.10::5025::SOCKET')",
                role=role, resource=resource) from None
        self.interface = parsed.interface_type
        for name, t in (("read_termination", read_termination),
                        ("write_termination", write_termination)):
            if t not in TERMINATIONS:
                raise InvalidValueError(f"{role}: {name} {t!r} must be LF, CR LF or CR")
        for name, v in (("timeout_s", timeout_s), ("open_timeout_s", open_timeout_s)):
            if not isinstance(v, (int, float)) or isinstance(v, bool) or not v > 0:
                raise InvalidValueError(f"{role}: {name} must be a positive number of seconds")
        for name, v in (("retries", retries), ("reconnects", reconnects)):
            if not isinstance(v, int) or isinstance(v, bool) or v < 0:
                raise InvalidValueError(f"{role}: {name} must be a whole number >= 0")
        self.read_termination = read_termination
        self.write_termination = write_termination
        self.timeout_s = float(timeout_s)
        self.open_timeout_s = float(open_timeout_s)
        self.retries = retries
        self.reconnects = reconnects
        self.backoff_s = float(backoff_s)
        self.drain_timeout_s = float(drain_timeout_s)
        self.max_stale_lines = max_stale_lines
        self.serial = dict(serial or {})
        self.common = {**COMMON_DEFAULTS, **(common or {})}
        for text in self.common.values():   # checked once here: the raw writes trust them
            check_command_text(text, f"{role}: common command")
        self.on_reconnect = on_reconnect
        self.visa_library = visa_library or DEFAULT_VISA_LIBRARY
        self._sleep = sleep
        self._rm = rm
        self._res: Any = None
        self._lib: Any = None        # the resource's VISA library and session handle, for
        self._vi: Any = None         # its low-level read and write (None: the resource's own)
        self._chunk = 20 * 1024
        self._user_open = False      # open() called and close() not yet
        self._dirty = False          # a reply may be pending: resync before trusting one
        self._link_down = False      # the link refused an operation: reopen it
        self._recovering = False
        self.idn: str | None = None
        self.counters = collections.Counter()
        self.events: collections.deque[str] = collections.deque(maxlen=200)

    # -- open / close ----------------------------------------------------------------------

    @property
    def is_open(self) -> bool:
        return self._user_open and self._res is not None

    def open(self) -> str:
        """Open the link, check *IDN?, send *CLS. Returns the identification."""
        if self.is_open:
            return self.idn or ""
        self._open_link()
        try:
            self.idn = self._handshake()
        except BaseException:
            self._close_link()
            raise
        self._user_open = True
        self._dirty = self._link_down = False
        return self.idn

    def close(self) -> None:
        """Close the resource this session opened (never the ResourceManager)."""
        self._user_open = False
        self._close_link()

    def _where(self) -> str:
        return self._where_text

    def _open_link(self) -> None:
        try:
            rm = self._rm if self._rm is not None else resource_manager(self.visa_library)
        except Exception as exc:
            reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InstrumentLinkError(
                f"{self.role}: cannot open '{self.resource}': VISA library "
                f"{self.visa_library!r} did not load ({reason}); check visa_library in the "
                "bench file ('@py' is pyvisa-py) and that this library is installed",
                role=self.role, resource=self.resource) from None
        try:
            res = rm.open_resource(self.resource, open_timeout=int(self.open_timeout_s * 1000))
        except Exception as exc:
            reason = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
            raise InstrumentLinkError(
                f"{self.role}: cannot open '{self.resource}': {reason}; check the address in "
                "the bench file and that the instrument is on", role=self.role,
                resource=self.resource) from None
        try:
            res.read_termination = self.read_termination
            res.write_termination = self.write_termination
            res.timeout = int(round(self.timeout_s * 1000))
            if str(self.interface).upper() == "ASRL":
                if "baud_rate" in self.serial:
                    res.baud_rate = self.serial["baud_rate"]
                if "data_bits" in self.serial:
                    res.data_bits = self.serial["data_bits"]
                if "parity" in self.serial:
                    res.parity = _PARITY[self.serial["parity"]]
                if "stop_bits" in self.serial:
                    res.stop_bits = _STOP_BITS[self.serial["stop_bits"]]
        except Exception as exc:
            try:
                res.close()
            except Exception:
                pass
            raise InstrumentLinkError(
                f"{self.role}: opened '{self.resource}' but could not set terminations and "
                f"timeout ({exc}); use a resource string with an upper-case resource class, "
                "e.g. 'TCPIP0::host::5025::SOCKET'", role=self.role,
                resource=self.resource) from None
        self._res = res
        lib, vi = getattr(res, "visalib", None), getattr(res, "session", None)
        fast = lib is not None and vi is not None and hasattr(lib, "read") and hasattr(lib, "write")
        self._lib, self._vi = (lib, vi) if fast else (None, None)
        self._chunk = int(getattr(res, "chunk_size", 20 * 1024) or 20 * 1024)

    def _close_link(self) -> None:
        res, self._res = self._res, None
        self._lib = self._vi = None
        if res is not None:
            try:
                res.close()
            except Exception:
                pass

    def _handshake(self) -> str:
        """*IDN? (must look like maker,model,serial,firmware), then *CLS."""
        ident = self.common["identify"]
        try:
            self._drain()
            self._raw_write(ident)
            reply = self._raw_read().strip()
        except _LinkDown as exc:
            raise InstrumentLinkError(
                f"{self.role}: cannot open '{self.resource}': {exc}; check the address in the "
                "bench file and that the instrument is on", role=self.role,
                resource=self.resource, command=ident) from None
        except (_Timeout, ValueError):
            raise InstrumentLinkError(
                f"{self.role}: '{self.resource}' gave no answer to '{ident}' within "
                f"{self.timeout_s:g} s; check that this address is the instrument's SCPI port, "
                "that it is on, and that its line ending is the profile's read termination "
                f"({_term_name(self.read_termination)})", role=self.role,
                resource=self.resource, command=ident) from None
        # IEEE 488.2 (10.14): four fields, manufacturer, model, serial number, firmware.
        fields = reply.split(",")
        if len(fields) < 4 or not fields[0].strip() or not reply.isprintable():
            raise InstrumentLinkError(
                f"{self.role}: '{self.resource}' answered '{ident}' with {reply!r}, not an "
                "IEEE 488.2 identification 'maker,model,serial,firmware'; check that the "
                "address points at the instrument", role=self.role, resource=self.resource,
                command=ident)
        try:
            self._raw_write(self.common["clear_status"])
        except (_LinkDown, _Timeout) as exc:
            raise InstrumentLinkError(
                f"{self.role}: '{self.resource}' answered '{ident}' but then refused "
                f"'{self.common['clear_status']}' ({exc}); check that the instrument is on and "
                "reachable", role=self.role, resource=self.resource) from None
        return reply

    # -- raw operations (translate backend exceptions) -------------------------------------

    # Every command reaching these two was checked by write(), query() or __init__ (common).
    # A pyvisa resource is driven through its VISA library's read and write (the low-level
    # layer of pyvisa, viRead/viWrite): the same bytes on the link as its write() and read()
    # make, without their per-call termination and warning bookkeeping (pyvisa docs: the
    # low-level API, `resource.visalib` with `resource.session`). Anything else that stands
    # in for a resource is driven by its own write() and read().

    def _raw_write(self, command: str) -> None:
        res = self._res
        if res is None:
            raise _LinkDown("the link is closed")
        try:
            if self._lib is not None:
                self._lib.write(self._vi, (command + self.write_termination).encode("ascii"))
            else:
                res.write(command)
        except VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                raise _Timeout(str(exc)) from None
            raise _LinkDown(str(exc)) from None
        except Exception as exc:  # OSError (reset, broken pipe), InvalidSession, backend errors
            raise _LinkDown(f"{type(exc).__name__}: {exc}") from None

    def _raw_read(self) -> str:
        res = self._res
        if res is None:
            raise _LinkDown("the link is closed")
        try:
            if self._lib is not None:
                # viRead until the termination character ends it (not a full chunk)
                data, status = self._lib.read(self._vi, self._chunk)
                while status == constants.StatusCode.success_max_count_read:
                    more, status = self._lib.read(self._vi, self._chunk)
                    data += more
                reply = data.decode("ascii")
            else:
                reply = res.read()
        except VisaIOError as exc:
            if exc.error_code == constants.StatusCode.error_timeout:
                raise _Timeout(str(exc)) from None
            raise _LinkDown(str(exc)) from None
        except UnicodeDecodeError as exc:
            raise ValueError(f"reply is not ASCII ({exc})") from None
        except Exception as exc:
            raise _LinkDown(f"{type(exc).__name__}: {exc}") from None
        return reply.rstrip("\r\n")

    def _drain(self) -> int:
        """Read and discard whatever is waiting (bounded in lines and by a short timeout)."""
        if self._res is None:
            raise _LinkDown("the link is closed")
        n = 0
        old = self._res.timeout
        try:
            self._res.timeout = max(1, int(round(self.drain_timeout_s * 1000)))
            for _ in range(self.max_stale_lines):
                try:
                    self._raw_read()
                except _Timeout:
                    break
                except ValueError:
                    pass
                n += 1
        finally:
            try:
                if self._res is not None:
                    self._res.timeout = old
            except Exception:
                pass
        return n

    # -- recovery --------------------------------------------------------------------------

    def _event(self, text: str) -> None:
        self.events.append(f"{self.role}: {text}")

    def resync(self) -> None:
        """Discard stale input, then *CLS and *OPC?; every line before the '1' is stale.

        IEEE 488.2: *OPC? answers 1 once everything before it is done, so the first '1'
        after it marks the point where command and reply are in step again.
        """
        self.counters["resyncs"] += 1
        stale = self._drain()
        self._raw_write(self.common["clear_status"])
        self._raw_write(self.common["operation_complete"])
        for _ in range(self.max_stale_lines):
            try:
                line = self._raw_read().strip()
            except ValueError:
                stale += 1
                continue
            if line in ("1", "+1"):
                break
            stale += 1
        else:
            raise _Timeout(f"no '1' among {self.max_stale_lines} lines after *OPC?")
        stale += self._drain()
        if stale:
            self.counters["stale_lines"] += stale
            self._event(f"discarded {stale} stale line(s) while resynchronising")
        self._dirty = False

    def _recover(self) -> None:
        if self._res is not None and not self._link_down:
            try:
                self.resync()
                return
            except _Timeout:
                self._event("resynchronising timed out: treating the link as dropped")
            except _LinkDown as exc:
                self._event(f"link refused resynchronising ({exc})")
        self.reconnect()

    def _recover_for(self, command: str) -> None:
        """_recover(), with the command that was to be sent named when the link is lost."""
        try:
            self._recover()
        except InstrumentLinkError as exc:
            if exc.command is not None:
                raise
            raise InstrumentLinkError(f"{exc} (while sending '{command}')", role=self.role,
                                      resource=self.resource, command=command) from None

    def reconnect(self) -> None:
        """Reopen the link (bounded attempts with backoff), check *IDN?, run on_reconnect."""
        if not self._user_open:
            raise InstrumentLinkError(
                f"{self._where()}: not open; open it (or use 'with') first",
                role=self.role, resource=self.resource)
        last = "no attempt made"
        for attempt in range(1, self.reconnects + 1):
            self._close_link()
            self._sleep(self.backoff_s * 2 ** (attempt - 1))
            try:
                self._open_link()
                idn = self._handshake()
                if self.idn is not None and idn != self.idn:
                    self._close_link()
                    raise _DifferentInstrument(idn)
                self._dirty = self._link_down = False
                if self.on_reconnect is not None:
                    self._recovering = True
                    try:
                        self.on_reconnect()
                    finally:
                        self._recovering = False
                self.counters["reconnects"] += 1
                self._event(f"reconnected (attempt {attempt})")
                return
            except _DifferentInstrument as exc:
                self._user_open = False
                raise InstrumentLinkError(
                    f"{self.role}: after reconnecting, '{self.resource}' answers as {exc} "
                    f"instead of {self.idn!r}; check that nothing else took this address",
                    role=self.role, resource=self.resource) from None
            except InstrumentError as exc:
                last = str(exc)
                self._link_down = True
        self._close_link()
        self.counters["reconnect_failures"] += 1
        raise InstrumentLinkError(
            f"{self.role}: lost the link to '{self.resource}' and could not reopen it in "
            f"{self.reconnects} attempt(s) (last: {last}); check that the instrument is on "
            "and reachable (cable, network), then run again", role=self.role,
            resource=self.resource)

    # -- public I/O ------------------------------------------------------------------------

    def _require_open(self) -> None:
        if not self._user_open:
            raise InstrumentLinkError(
                f"{self._where()}: not open; use 'with' or call open() first",
                role=self.role, resource=self.resource)

    def write(self, command: str) -> None:
        """Send one command (retried after reconnecting if the link refused it)."""
        check_command_text(command, self._where())
        self._require_open()
        attempts = 1 if self._recovering else self.retries + 1
        last = ""
        for attempt in range(attempts):
            if attempt:
                self._sleep(self.backoff_s * 2 ** (attempt - 1))
            try:
                if not self._recovering and (self._dirty or self._link_down or self._res is None):
                    self._recover_for(command)
                self._raw_write(command)
                return
            except _LinkDown as exc:
                self.counters["link_errors"] += 1
                self._link_down = True
                last = str(exc)
            except _Timeout as exc:
                self.counters["timeouts"] += 1
                self._dirty = True
                last = f"write timed out ({exc})"
            except BaseException:       # e.g. Ctrl-C mid-message: the stream is unknown now
                self._dirty = True
                raise
        raise InstrumentLinkError(
            f"{self._where()}: could not send '{command}' ({last}); check that the instrument "
            "is on and reachable", role=self.role, resource=self.resource, command=command)

    def query(self, command: str, parse: Callable[[str], Any] | None = None,
              before: tuple[str, ...] = ()) -> Any:
        """Send `before` commands and `command`, read one reply, optionally parse it.

        A timeout, a refused link or an unreadable reply (parse raised ValueError) leads to
        resynchronising (or reconnecting) and trying again, at most `retries` more times.
        """
        for c in (*before, command):
            check_command_text(c, self._where())
        self._require_open()
        attempts = 1 if self._recovering else self.retries + 1
        kind, detail = "timeout", ""
        for attempt in range(attempts):
            if attempt:
                self._sleep(self.backoff_s * 2 ** (attempt - 1))
            try:
                if not self._recovering and (self._dirty or self._link_down or self._res is None):
                    self._recover_for(command)
                for c in before:
                    self._raw_write(c)
                self._raw_write(command)
                reply = self._raw_read()
            except _Timeout as exc:
                self.counters["timeouts"] += 1
                self._dirty = True
                kind, detail = "timeout", str(exc)
                self._event(f"no reply to '{command}' within {self.timeout_s:g} s")
                continue
            except _LinkDown as exc:
                self.counters["link_errors"] += 1
                self._link_down = True
                kind, detail = "link", str(exc)
                self._event(f"link refused '{command}' ({exc})")
                continue
            except ValueError as exc:
                self.counters["garbled"] += 1
                self._dirty = True
                kind, detail = "garbled", str(exc)
                continue
            except BaseException:       # e.g. Ctrl-C between write and read: a reply pends
                self._dirty = True
                raise
            if parse is None:
                return reply
            try:
                return parse(reply)
            except ValueError as exc:
                self.counters["garbled"] += 1
                self._dirty = True
                kind, detail = "garbled", f"{reply!r}: {exc}"
                self._event(f"unreadable reply to '{command}': {reply!r}")
        n = attempts
        if kind == "timeout":
            raise InstrumentTimeout(
                f"{self._where()}: no reply to '{command}' in {n} attempt(s) of "
                f"{self.timeout_s:g} s (resynchronised between attempts); check the cable or "
                "network, that the instrument is on, and that its line ending is the profile's "
                f"read termination ({_term_name(self.read_termination)})",
                role=self.role, resource=self.resource, command=command)
        if kind == "link":
            raise InstrumentLinkError(
                f"{self._where()}: the link failed during '{command}' ({detail}); check that "
                "the instrument is on and reachable", role=self.role, resource=self.resource,
                command=command)
        raise InstrumentError(
            f"{self._where()}: unreadable reply to '{command}' in {n} attempt(s) (last "
            f"{detail}); check that the profile's commands and terminations match the "
            "instrument", role=self.role, resource=self.resource, command=command)


class _DifferentInstrument(Exception):
    """Internal: another identification answered after reconnecting."""
