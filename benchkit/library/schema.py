"""The library file: SQLite schema, its version, and the migrations that bring old files up to date.

The schema version lives in `PRAGMA user_version` (0 = empty file); the `meta` table names the
format, so an SQLite file of some other program is recognised and left alone. Migrations run in
one IMMEDIATE transaction and re-read the version inside it, so two processes opening a fresh
file at once create the schema once. A file written by a newer benchkit is refused before
anything is touched.
"""

from __future__ import annotations

import os
import sqlite3
import time
from collections.abc import Callable
from pathlib import Path

from benchkit.errors import UserError

FORMAT_NAME = "benchkit-library"
SQLITE_MAGIC = b"SQLite format 3\x00"
DEFAULT_BUSY_TIMEOUT_S = 30.0
ORIGINS = ("lot summary", "measured", "supplier claim")  # also the query's order of preference


def is_url(target) -> bool:
    """A PostgreSQL connection URL rather than a file path."""
    return isinstance(target, str) and target.startswith(("postgresql://", "postgres://"))


def default_library_target() -> str | Path:
    """$BENCHKIT_LIBRARY (a file path or a postgresql:// URL), else the default file."""
    env = os.environ.get("BENCHKIT_LIBRARY")
    if env and is_url(env):
        return env
    return default_library_path()


def default_library_path() -> Path:
    """$BENCHKIT_LIBRARY, else $XDG_DATA_HOME/benchkit/library.sqlite, else ~/.local/share/benchkit/library.sqlite."""
    env = os.environ.get("BENCHKIT_LIBRARY")
    if env:
        return Path(env).expanduser()
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base).expanduser() / "benchkit" / "library.sqlite"


def _v1(conn: sqlite3.Connection) -> None:
    """Parts, samples, runs, curves (document kept whole, numbers unpacked for the query).

    params_f64 / covariance_f64 / numbers_f64 hold float64 little-endian copies of the
    parameters (param_names order), the covariance and (valid_lo_V, valid_hi_V, temp_C,
    origin rank in ORIGINS, branch code 0 none / 1 rising / 2 falling / 3 other; from
    version 3 also model_error_F, from version 4 the model-choice term, pack.N_NUMBERS), so
    the query can load a whole model group as one hex string, exactly (no decimal round trip).
    The documents live in their own table so that the curve rows stay small and a scan of
    them reads little.
    """
    origins = ", ".join(f"'{o}'" for o in ORIGINS)  # constants of this module, not input
    # Statement by statement: executescript() would COMMIT the open migration transaction.
    script = f"""
        CREATE TABLE meta (
            key   TEXT PRIMARY KEY,
            value TEXT NOT NULL
        ) WITHOUT ROWID;
        CREATE TABLE part (
            part_id     TEXT PRIMARY KEY,
            description TEXT NOT NULL DEFAULT '',
            nominal_C_F REAL,
            tolerance   TEXT,
            rated_V     REAL,
            class_code  TEXT,
            case_code   TEXT,
            supplier    TEXT,
            added_utc   TEXT NOT NULL
        );
        CREATE TABLE sample (
            id        INTEGER PRIMARY KEY,
            part_id   TEXT NOT NULL REFERENCES part(part_id) ON DELETE CASCADE,
            sample_id TEXT NOT NULL,
            UNIQUE (part_id, sample_id)
        );
        CREATE TABLE run (
            id            INTEGER PRIMARY KEY,
            points_sha256 TEXT NOT NULL UNIQUE,
            run_id        TEXT,
            path          TEXT,
            status        TEXT,
            manifest      TEXT NOT NULL,
            added_utc     TEXT NOT NULL
        );
        CREATE TABLE curve (
            id             INTEGER PRIMARY KEY,
            content_sha256 TEXT NOT NULL UNIQUE,
            part_id        TEXT NOT NULL REFERENCES part(part_id) ON DELETE CASCADE,
            sample_ref     INTEGER REFERENCES sample(id) ON DELETE SET NULL,
            run_ref        INTEGER REFERENCES run(id) ON DELETE SET NULL,
            origin         TEXT NOT NULL CHECK (origin IN ({origins})),
            model          TEXT NOT NULL,
            param_names    TEXT NOT NULL,
            params_f64     BLOB,
            covariance_f64 BLOB,
            valid_lo_V     REAL NOT NULL,
            valid_hi_V     REAL NOT NULL,
            temp_C         REAL NOT NULL,
            numbers_f64    BLOB NOT NULL,
            freq_Hz        REAL,
            ac_level_Vrms  REAL,
            function       TEXT,
            branch         TEXT,
            sample_id      TEXT,
            esr_ohm        REAL,
            added_utc      TEXT NOT NULL
        );
        CREATE TABLE curve_doc (
            curve_id INTEGER PRIMARY KEY REFERENCES curve(id) ON DELETE CASCADE,
            document TEXT NOT NULL
        );
        CREATE INDEX curve_by_part ON curve(part_id);
        CREATE INDEX curve_by_run ON curve(run_ref);
        CREATE INDEX curve_by_model ON curve(model, param_names);
        """
    for statement in script.split(";"):
        if statement.strip():
            conn.execute(statement)
    conn.execute("INSERT INTO meta(key, value) VALUES ('format', ?)", (FORMAT_NAME,))
    conn.execute("INSERT INTO meta(key, value) VALUES ('generation', '0')")
    conn.execute(
        "INSERT INTO meta(key, value) VALUES ('created_utc', ?)",
        (time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),),
    )


def _v2(conn: sqlite3.Connection) -> None:
    """Records with a history, verdicts, and the query's column store.

    - part.updated_utc: when the catalogue fields last changed (a merge keeps the later ones);
    - revision: a curve is never edited; a revision is a new record, and this small table names
      the content hash it replaces (the query answers from the latest);
    - verdict: verification reports (their JSON document), identified by content hash;
    - curve_pack: the query's packed arrays (pack.py; its layout and filling are _v3's).
    """
    for statement in (
        "ALTER TABLE part ADD COLUMN updated_utc TEXT NOT NULL DEFAULT ''",
        "UPDATE part SET updated_utc = added_utc",
"""CREATE TABLE revision (
            new_sha256 TEXT PRIMARY KEY,
            old_sha256 TEXT NOT NULL
        )""",
        """CREATE TABLE verdict (
            id             INTEGER PRIMARY KEY,
            content_sha256 TEXT NOT NULL UNIQUE,
            part_id        TEXT NOT NULL REFERENCES part(part_id) ON DELETE CASCADE,
            verdict        TEXT NOT NULL,
            rule           TEXT,
            document       TEXT NOT NULL,
            added_utc      TEXT NOT NULL
        )""",
        "CREATE INDEX verdict_by_part ON verdict(part_id)",
        """CREATE TABLE curve_pack (
            id          INTEGER PRIMARY KEY,
            model       TEXT NOT NULL,
            param_names TEXT NOT NULL,
            loose       INTEGER NOT NULL,
            n           INTEGER NOT NULL,
            ids         BLOB NOT NULL,
            part_ids    TEXT NOT NULL,
            numbers     BLOB NOT NULL,
            params      BLOB,
            covariance  BLOB
        )""",
    ):
        conn.execute(statement)
    # the pack is filled by _v3, which gives it its present layout


PACK_TABLE = """CREATE TABLE curve_pack (
            id          INTEGER PRIMARY KEY,
            model       TEXT NOT NULL,
            param_names TEXT NOT NULL,
            loose       INTEGER NOT NULL,
            n           INTEGER NOT NULL,
            ids         BLOB NOT NULL,
            part_keys   TEXT NOT NULL,
            part_codes  BLOB NOT NULL,
            numbers     BLOB NOT NULL,
            params      BLOB,
            covariance  BLOB
        )"""


def _v3(conn: sqlite3.Connection) -> None:
    """model_error_F among each curve's query numbers (the query's band includes it, as the
    curve's own does); the pack keeps part codes and the covariance's lower triangle (pack.py)."""
    from benchkit.library import pack

    pack.migrate_v3(conn, [PACK_TABLE])


# MIGRATIONS[i] takes a file from version i to version i + 1. The PostgreSQL schema
# (benchkit.library.postgres.MIGRATIONS) has the same versions, step for step.
def _v4(conn: sqlite3.Connection) -> None:
    """The model-choice term among each curve's query numbers (pack.migrate_v4)."""
    from benchkit.library import pack

    pack.migrate_v4(conn)


MIGRATIONS: list[Callable[[sqlite3.Connection], None]] = [_v1, _v2, _v3, _v4]


def latest_version() -> int:
    return len(MIGRATIONS)


def check_sqlite_file(path: Path) -> bool:
    """True for an SQLite file, False for a missing or empty one; UserError for anything else."""
    if not path.exists():
        return False
    if path.is_dir():
        raise UserError(f"{path}: is a folder, not a library file; give a file path with --library")
    with open(path, "rb") as fh:
        head = fh.read(len(SQLITE_MAGIC))
    if not head:
        return False
    if head != SQLITE_MAGIC:
        raise UserError(
            f"{path}: not a benchkit library (not an SQLite database); check --library or BENCHKIT_LIBRARY"
        )
    return True


def read_version(conn: sqlite3.Connection, where: str) -> int:
    """The schema version of an open file, after checking that the file is ours.

    Version, tables and format are read in one snapshot: read one by one, another process
    creating the schema in between would make a fresh library look like a foreign file.
    """
    own = not conn.in_transaction
    try:
        if own:
            conn.execute("BEGIN")
        try:
            version = conn.execute("PRAGMA user_version").fetchone()[0]
            tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            fmt = None
            if "meta" in tables:
                row = conn.execute("SELECT value FROM meta WHERE key = 'format'").fetchone()
                fmt = row[0] if row else None
        finally:
            if own and conn.in_transaction:
                conn.execute("COMMIT")
    except sqlite3.OperationalError as exc:
        if "locked" in str(exc).lower() or "busy" in str(exc).lower():
            raise  # the caller's retry loop handles a busy file
        raise UserError(f"{where}: not a benchkit library ({exc}); check --library or BENCHKIT_LIBRARY") from None
    except sqlite3.DatabaseError as exc:
        raise UserError(f"{where}: not a benchkit library ({exc}); check --library or BENCHKIT_LIBRARY") from None
    if version == 0:
        if tables:
            raise UserError(f"{where}: an SQLite database but not a benchkit library (no schema version); "
                            f"choose another --library file")
        return 0
    if fmt != FORMAT_NAME:
        raise UserError(f"{where}: an SQLite database but not a benchkit library (format {fmt!r}); "
                        f"choose another --library file")
    if version > latest_version():
        raise UserError(
            f"{where}: library schema version {version} is newer than this benchkit understands "
            f"({latest_version()}); update benchkit to use this library"
        )
    return version


def migrate(conn: sqlite3.Connection, where: str, begin: Callable[[], None]) -> int:
    """Bring the schema to the latest version in one transaction; returns the version found."""
    found = read_version(conn, where)
    if found == latest_version():
        return found
    begin()  # BEGIN IMMEDIATE with retries: only one writer gets here at a time
    try:
        current = read_version(conn, where)  # another process may have migrated meanwhile
        for step in range(current, latest_version()):
            MIGRATIONS[step](conn)
            conn.execute(f"PRAGMA user_version = {int(step) + 1}")  # PRAGMA takes no parameters
        conn.execute("COMMIT")
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    return found
