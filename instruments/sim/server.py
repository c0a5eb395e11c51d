"""The TCP transport of one simulated instrument: newline-terminated SCPI over a socket.

Why its own loop instead of socketserver: stop() must also end the client connections and
join every thread it started, so that a test session can start and stop hundreds of benches
without leaking threads or ports; and a fault may delay a reply in a way stop() can cut short.

Robustness rules: the server never raises out of a client thread and never leaves a client
hanging because of what it sent. Bytes that are not printable ASCII, and lines longer than
MAX_LINE_BYTES, end as -102 in the instrument's error queue; a client that disconnects
mid-line is forgotten; the next client is served as if nothing happened.
"""

from __future__ import annotations

import logging
import selectors
import socket
import threading

from instruments.sim.faults import FaultPlan, LinkActions, garble_reply
from instruments.sim.scpi import ScpiInstrument

LISTEN_BACKLOG = 128  # a backlog of 5 stalled rapid reconnects (see the style notes)
MAX_LINE_BYTES = 8192
_RECV_BYTES = 65536
_QUICKACK = getattr(socket, "TCP_QUICKACK", None)  # Linux only

log = logging.getLogger(__name__)


class InstrumentServer:
    """Serves one instrument on (host, port); port 0 picks a free port."""

    def __init__(self, instrument: ScpiInstrument, host: str = "127.0.0.1", port: int = 0,
                 faults: FaultPlan | None = None):
        self.instrument = instrument
        self.role = instrument.role
        self.host = host
        self._requested_port = port
        self._faults = faults
        self._listener: socket.socket | None = None
        self._wake_r: socket.socket | None = None
        self._wake_w: socket.socket | None = None
        self._accept_thread: threading.Thread | None = None
        self._clients: dict[socket.socket, threading.Thread] = {}
        self._clients_lock = threading.Lock()
        self._stopping = threading.Event()
        self.port: int | None = None

    @property
    def resource(self) -> str:
        """The VISA resource string (upper case: pyvisa needs it for a socket resource)."""
        return f"TCPIP0::{self.host}::{self.port}::SOCKET"

    def start(self) -> None:
        """Bind and listen; raises OSError (e.g. port in use) with nothing left open."""
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        try:
            listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            listener.bind((self.host, self._requested_port))
            listener.listen(LISTEN_BACKLOG)
        except OSError:
            listener.close()
            raise
        self._listener = listener
        self.port = listener.getsockname()[1]
        self._wake_r, self._wake_w = socket.socketpair()
        self._accept_thread = threading.Thread(
            target=self._accept_loop, name=f"sim-{self.role}-accept", daemon=True)
        self._accept_thread.start()

    def stop(self, join_timeout_s: float = 5.0) -> None:
        """Close the listener and every client connection; join the threads."""
        if self._listener is None:
            return
        self._stopping.set()
        try:
            self._wake_w.send(b"x")
        except OSError:
            pass
        if self._accept_thread is not None:
            self._accept_thread.join(join_timeout_s)
        with self._clients_lock:
            clients = list(self._clients.items())
        for conn, _ in clients:
            try:
                conn.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
        for _, thread in clients:
            thread.join(join_timeout_s)
        for sock in (self._listener, self._wake_r, self._wake_w):
            try:
                sock.close()
            except OSError:
                pass
        self._listener = None

    # ------------------------------------------------------------ threads

    def _accept_loop(self) -> None:
        with selectors.DefaultSelector() as selector:
            selector.register(self._listener, selectors.EVENT_READ)
            selector.register(self._wake_r, selectors.EVENT_READ)
            while not self._stopping.is_set():
                for key, _ in selector.select():
                    if key.fileobj is self._wake_r or self._stopping.is_set():
                        return
                    try:
                        conn, _addr = self._listener.accept()
                    except OSError:
                        continue
                    conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
                    thread = threading.Thread(target=self._serve_client, args=(conn,),
                                              name=f"sim-{self.role}-client", daemon=True)
                    with self._clients_lock:
                        self._clients[conn] = thread
                    thread.start()

    def _serve_client(self, conn: socket.socket) -> None:
        try:
            self._client_loop(conn)
        except Exception:  # the server must outlive any bug a message uncovers
            log.exception("simulated %s: client connection failed", self.role)
        finally:
            with self._clients_lock:
                self._clients.pop(conn, None)
            try:
                conn.close()
            except OSError:
                pass

    def _client_loop(self, conn: socket.socket) -> None:
        buffer = bytearray()
        discarding = False  # inside a line that was already too long
        while not self._stopping.is_set():
            try:
                data = conn.recv(_RECV_BYTES)
            except OSError:
                return
            if not data:
                return  # the client went away, perhaps mid-line: drop the partial line
            if _QUICKACK is not None:
                # Acknowledge at once: a client with Nagle on (pyvisa-py's default) holds its
                # next small write until our ACK, which Linux would delay by up to 40 ms.
                try:
                    conn.setsockopt(socket.IPPROTO_TCP, _QUICKACK, 1)
                except OSError:
                    pass
            buffer += data
            while True:
                end = buffer.find(b"\n")
                if end < 0:
                    if len(buffer) > MAX_LINE_BYTES:
                        if not discarding:
                            self.instrument.errors.push(
                                -102, f"message longer than {MAX_LINE_BYTES} bytes")
                            discarding = True
                        buffer.clear()
                    break
                raw = bytes(buffer[:end])
                del buffer[: end + 1]
                if discarding:
                    discarding = False  # the tail of the long line: already reported
                    continue
                if len(raw) > MAX_LINE_BYTES:
                    self.instrument.errors.push(-102, f"message longer than {MAX_LINE_BYTES} bytes")
                    continue
                if not self._handle_line(conn, raw):
                    return

    def _handle_line(self, conn: socket.socket, raw: bytes) -> bool:
        """Run one message; False when the connection is to be closed."""
        if raw.endswith(b"\r"):
            raw = raw[:-1]
        # latin-1 maps every byte to one character; non-ASCII ones become -102 in the parser.
        text = raw.decode("latin-1")
        if not text.strip():
            return True
        actions = (self._faults.on_message(self.role, "?" in text) if self._faults
                   else LinkActions())
        if actions.drop:
            try:
                conn.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            return False
        try:
            reply = self.instrument.handle(text)
        except Exception as exc:  # a bug in a handler: report it in the queue, keep serving
            log.exception("simulated %s: handler failed on %r", self.role, text[:80])
            self.instrument.errors.push(-300, f"internal error {type(exc).__name__}")
            reply = None
        if reply is None or actions.swallow:
            return True
        if actions.garble:
            reply = garble_reply(reply)
        if actions.delay_s > 0 and self._stopping.wait(actions.delay_s):
            return False
        try:
            conn.sendall(reply.encode("ascii", "replace") + b"\n")
        except OSError:
            return False
        return True
