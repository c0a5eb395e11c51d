"""One open library file: validation before any write, WAL, busy timeout, transactions with retries.

Several benches may write to one file at once. SQLite serialises writers; WAL lets readers go on
while one writes. Every write runs as BEGIN IMMEDIATE (the write lock is taken up front, so two
writers never deadlock upgrading read locks), waits up to the busy timeout, and is retried with
a jittered back-off if SQLite still reports the file busy. Every write transaction also bumps
the `generation` counter in `meta`, which tells cached query tables (this process or another)
that they are stale.
"""

from __future__ import annotations

import random
import sqlite3
import time
from contextlib import contextmanager
from pathlib import Path

from benchkit.errors import UserError
from benchkit.library import schema

MEMORY = ":memory:"


def _is_busy(exc: sqlite3.OperationalError) -> bool:
    text = str(exc).lower()
    return "locked" in text or "busy" in text


def open_connection(target, *, create: bool = True, busy_timeout_s: float = schema.DEFAULT_BUSY_TIMEOUT_S,
                    readonly: bool = False):
    """A library connection: PostgreSQL for a postgresql:// URL, else an SQLite file (or :memory:)."""
    if schema.is_url(target):
        from benchkit.library.postgres import PostgresConnection

        return PostgresConnection(target, create=create, busy_timeout_s=busy_timeout_s, readonly=readonly)
    return LibraryConnection(target, create=create, busy_timeout_s=busy_timeout_s, readonly=readonly)


class LibraryConnection:
    """An sqlite3 connection in autocommit mode whose transactions this class opens and closes.

    check_same_thread is off: a Library used from several threads (the web server) guards
    itself with a lock; sqlite3 itself is built thread-safe.
    """

    kind = "sqlite"

    def __init__(self, path: str | Path, *, create: bool = True,
                 busy_timeout_s: float = schema.DEFAULT_BUSY_TIMEOUT_S, readonly: bool = False):
        self.busy_timeout_s = float(busy_timeout_s)
        self.where = str(path)
        self.created = False
        if str(path) == MEMORY:
            self.path = None
            conn = sqlite3.connect(MEMORY, isolation_level=None, check_same_thread=False)
        else:
            p = Path(path).expanduser()
            self.path = p
            self.where = str(p)
            exists = schema.check_sqlite_file(p)
            self.created = not p.exists() and not readonly
            if not exists and (readonly or not create):
                raise UserError(
                    f"no library at {p}; give --library or set BENCHKIT_LIBRARY, or create one with "
                    f"'benchkit library add-parts PARTS.toml' or 'benchkit library add RUN_DIR'"
                )
            if readonly:
                uri = f"{p.resolve().as_uri()}?mode=ro"
                conn = sqlite3.connect(uri, uri=True, timeout=self.busy_timeout_s, isolation_level=None,
                                       check_same_thread=False)
            else:
                p.parent.mkdir(parents=True, exist_ok=True)
                conn = sqlite3.connect(str(p), timeout=self.busy_timeout_s, isolation_level=None,
                                       check_same_thread=False)
        self.conn = conn
        try:
            conn.execute(f"PRAGMA busy_timeout = {int(self.busy_timeout_s * 1000)}")
            version = self._retry(lambda: schema.read_version(conn, self.where))  # refuses foreign/newer files
            if self.path is not None and not readonly:
                if version == 0:
                    self._retry(lambda: conn.execute("PRAGMA journal_mode = WAL"))
                else:
                    mode = conn.execute("PRAGMA journal_mode").fetchone()[0]
                    if str(mode).lower() != "wal":
                        self._retry(lambda: conn.execute("PRAGMA journal_mode = WAL"))
            conn.execute("PRAGMA foreign_keys = ON")
            conn.execute("PRAGMA synchronous = NORMAL")
            if readonly:
                if version == 0:
                    raise UserError(f"{self.where}: an empty file, not a benchkit library; nothing to read")
                if version != schema.latest_version():
                    raise UserError(f"{self.where}: library schema version {version} is older than "
                                    f"this benchkit's ({schema.latest_version()}); open it once for "
                                    f"writing to migrate it")
            else:
                schema.migrate(conn, self.where, self.begin_immediate)
        except BaseException:
            conn.close()
            raise

    # -- transactions -------------------------------------------------------------------------
    def _retry(self, action):
        deadline = time.monotonic() + self.busy_timeout_s
        delay = 0.005
        while True:
            try:
                return action()
            except sqlite3.OperationalError as exc:
                if not _is_busy(exc) or time.monotonic() >= deadline:
                    if _is_busy(exc):
                        raise UserError(
                            f"{self.where}: library stayed busy for {self.busy_timeout_s:g} s "
                            f"(another process is writing); try again"
                        ) from None
                    raise
                time.sleep(delay * (0.5 + random.random()))
                delay = min(delay * 2, 0.25)

    def begin_immediate(self) -> None:
        self._retry(lambda: self.conn.execute("BEGIN IMMEDIATE"))

    @contextmanager
    def write(self):
        """One write transaction: all of it lands, or none of it."""
        self.begin_immediate()
        try:
            before = self.conn.total_changes
            yield self.conn
            if self.conn.total_changes != before:  # nothing written: leave the counter alone
                self.conn.execute(
                    "UPDATE meta SET value = CAST(CAST(value AS INTEGER) + 1 AS TEXT) WHERE key = 'generation'"
                )
            self._retry(lambda: self.conn.execute("COMMIT"))
        except BaseException:
            if self.conn.in_transaction:
                self.conn.execute("ROLLBACK")
            raise

    @contextmanager
    def read(self):
        """A consistent snapshot for several SELECTs (WAL: never blocks writers)."""
        self._retry(lambda: self.conn.execute("BEGIN"))
        try:
            yield self.conn
        finally:
            if self.conn.in_transaction:
                self.conn.execute("COMMIT")

    def generation(self) -> int:
        row = self.conn.execute("SELECT value FROM meta WHERE key = 'generation'").fetchone()
        return int(row[0])

    def close(self) -> None:
        self.conn.close()
