"""The run directory: points.csv that survives a crash, and run.json that says what happened.

Every point's row goes straight to the kernel (os.write, no buffer of ours) before the next
bias step, so a crash or kill -9 of benchkit loses at most the point in progress (a trailing
partial line, dropped on resume). Its fsync runs in a thread of its own while the next point
is measured (the disk's wait overlaps the instruments'); the next row is written, and run.json
replaced, only once that fsync has confirmed, so a power cut loses at most the point in
progress and, when it falls within the milliseconds of that fsync, the row saved just before.
A failed fsync cuts its row off again and stops the run at the next row or run.json update.
run.json is replaced atomically at the start (status running), on every status change and at
the end (complete with the sha256 of points.csv, or aborted with the reason). The columns are the
interface with the fitting and verification code (DEVELOPERS.md, "File formats": run directory).

points.chain holds one digest per line of points.csv, written with the line: a hash chain,
h_k = sha256(h_(k-1) || line_k), started from the run id. An aborted run has no final
sha256, so the chain is what shows a completed row was edited (resume and fit refuse it,
naming the line). It guards against edits and damage, not against someone who recomputes
the chain on purpose.
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import math
import os
from concurrent.futures import ThreadPoolExecutor
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Mapping

from benchkit.atomic import write_text_atomic
from benchkit.bounded import control_char
from benchkit.errors import UserError

RUN_FORMAT = "benchkit-run"
RUN_VERSION = 1
RUN_FILE = "run.json"
POINTS_FILE = "points.csv"
CHAIN_FILE = "points.chain"
_DIGEST_LINE = 65  # 64 hex digits and a newline
# The writer's lock beside the data (filelock: flock on Linux and macOS, msvcrt on Windows).
# The file may stay after the run; only a live lock on it means a writer is at work.
LOCK_FILE = "run.lock"

COLUMNS = (
    "run_id", "sample_id", "part_id", "channel", "step_index", "branch", "repeat",
    "bias_set_V", "bias_meas_V", "bias_current_A", "function", "freq_Hz",
    "ac_level_set_Vrms", "ac_level_dut_Vrms", "C_F", "C_std_F", "D", "Rs_ohm", "n_readings",
    "temp_C", "t_s", "dwell_s", "settle_s", "drift_pct_per_s", "flags", "utc",
)

_COLUMN_SET = frozenset(COLUMNS)

# The one list of words the flags column may hold (";"-joined in a row).
FLAGS = {
    "bias_readback": "|bias_meas_V - bias_set_V| exceeded limits.bias_tolerance_V",
    "current_limit": "the supply was limiting current (at its programmed limit, or its voltage sagging "
                     "below the set value while sourcing): the part saw less than the set bias",
    "overload": "the meter reported overload (9.9E37) on at least one reading; those readings are left out",
    "temp_change": "temperature moved more than limits.temp_tolerance_C since the sample's first point",
    "resumed": "first point measured after the run was resumed; the interrupted branch was restarted "
               "from 0 V through the loop's earlier points, not read again (run.json event "
               "resume_branch_restart)",
    "max_dwell": "settle detection reached settle.max_dwell_s before its settle rule was met "
                 "(drift rate or predicted residual): the point was read while the part may still drift",
    "predicted": "C_F is the settled value predicted from the relaxation fit of the dwell's readings "
                 "(settle.max_prediction_u_pct_of_C0); C_std_F/sqrt(n_readings) is its standard uncertainty",
    "above_rated": "the plan took this sample above its part's rated voltage (limits.allow_above_rated, "
                   "confirmed by the operator); its later behaviour may not be the part's own",
    "freq_list": "a row of the plan's frequency list at this bias point (benchkit/sweep/frequency.py): "
                 "C_F, Rs_ohm, D of the (corrected) impedance at freq_Hz, not a point of the C(V) sweep",
    "meter_status": "the meter's status field marked at least one reading as not good (a status the "
                    "profile does not list in status_ok); those readings are left out",
    "level_off_standard": "the AC level across the part was outside the standard level and its "
                          "tolerance (IEC 60384-1: 1.0 +-0.2 Vrms, above 10 uF class 2 0.5 +-0.1 Vrms)",
    "C_out_of_tolerance": "at 0 V the capacitance was outside the part's tolerance (IEC 60062 letter) "
                          "but within a factor 2 of nominal: a finding, not a misreading",
    "retried": "an instrument exchange of this point needed a retry (no reply, a garbled or late reply, "
               "or a reconnect after a dropped link); run.json events 'link_recovered' say which",
}


def join_flags(words: Iterable[str]) -> str:
    """The flags field for a row: known words only, each once, in the order raised."""
    out: list[str] = []
    for w in words:
        if w not in FLAGS:
            raise ValueError(f"flag {w!r} is not in benchkit.sweep.runlog.FLAGS")
        if w not in out:
            out.append(w)
    return ";".join(out)


class RunFileError(Exception):
    """points.csv or run.json could not be written (disk full, read-only, I/O error).

    Raised mid-run: the sweep treats it as a reason to stop (bias off first), not as a bug.
    """


def _write_problem(path: Path, exc: OSError) -> str:
    return (f"cannot write {path} ({exc.strerror or exc}); the disk may be full or read-only: "
            "free space or fix the folder")


def utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def format_value(v: Any) -> str:
    """CSV text of one field: empty for unknown (None/NaN), full precision for floats."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return "1" if v else "0"
    if isinstance(v, float):
        return "" if not math.isfinite(v) else repr(v)
    return str(v)


def row_line(row: Mapping[str, Any]) -> str:
    missing = [c for c in COLUMNS if c not in row]
    extra = [k for k in row if k not in _COLUMN_SET]
    if missing or extra:
        raise ValueError(f"points row: missing {missing}, unknown {extra}")
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerow([format_value(row[c]) for c in COLUMNS])
    return buf.getvalue()


def sha256_file(path: str | os.PathLike) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 16), b""):
            h.update(chunk)
    return h.hexdigest()


def read_points(run_dir: str | os.PathLike, chain: bool = True) -> tuple[list[dict[str, str]], int]:
    """The complete rows of points.csv and the byte length they occupy (a partial tail excluded).

    With `chain` (and a points.chain beside it) the rows are checked against their digests
    and a last row whose digest never reached the disk is left out (the point in progress).
    For callers that need every row at once (fitting); a resume streams them (StoredRows)."""
    scan = scan_points(run_dir, chain=chain)
    return list(iter_rows(run_dir, scan.end)), scan.end


class PointsScan:
    """What one checked pass over points.csv found: rows kept, their byte end, the last row and
    the chain digest after it (where a resumed session's first row continues the chain)."""

    __slots__ = ("n_rows", "end", "last", "prev")

    def __init__(self, n_rows: int, end: int, last: dict[str, str] | None, prev: bytes | None):
        self.n_rows, self.end, self.last, self.prev = n_rows, end, last, prev


def _complete_end(path: Path) -> tuple[int, int]:
    """(complete lines, byte offset just after the last one) of a file, read in chunks."""
    n = pos = end = 0
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 16), b""):
            k = chunk.count(b"\n")
            if k:
                n += k
                end = pos + chunk.rfind(b"\n") + 1
            pos += len(chunk)
    return n, end


def _lines(path: Path, end: int):
    """(line number, bytes) of the first `end` bytes of a file, one line at a time."""
    with open(path, "rb") as fh:
        pos = 0
        for n, line in enumerate(fh, start=1):
            if pos >= end:
                return
            pos += len(line)
            yield n, line


def _parse_line(path: Path, n: int, line: bytes) -> list[str]:
    try:
        text = line.decode("utf-8", errors="strict")
        fields = next(csv.reader([text.rstrip("\n")]), [])
    except UnicodeDecodeError:
        raise UserError(f"{path}: line {n}: not UTF-8 text; the file is damaged or not from benchkit") from None
    except csv.Error as exc:
        raise UserError(f"{path}: not a readable CSV file ({exc}); the file is damaged or not from benchkit") from None
    return fields


def _row(path: Path, n: int, line: bytes) -> dict[str, str]:
    fields = _parse_line(path, n, line)
    if len(fields) != len(COLUMNS):
        raise UserError(f"{path}: line {n} has {len(fields)} fields, expected {len(COLUMNS)}; the file was edited or damaged")
    for col, text in zip(COLUMNS, fields):
        bad = control_char(text)
        if bad is not None:
            raise UserError(f"{path}: line {n}: column '{col}' holds the control character "
                            f"{bad}; the file was edited or damaged")
    return dict(zip(COLUMNS, fields))


def iter_rows(run_dir: str | os.PathLike, end: int):
    """The data rows of points.csv's first `end` bytes (from scan_points), checked, one at a
    time: memory stays constant however long the run."""
    path = Path(run_dir) / POINTS_FILE
    for n, line in _lines(path, end):
        if n > 1:
            yield _row(path, n, line)


def scan_points(run_dir: str | os.PathLike, chain: bool = True) -> PointsScan:
    """One pass over points.csv in constant memory: the header, every row's fields, and with
    `chain` (and a points.chain beside it) every row against its digest."""
    d = Path(run_dir)
    path = d / POINTS_FILE
    try:
        n_lines, end = _complete_end(path)
    except FileNotFoundError:
        raise UserError(f"{path}: not found; is {run_dir} a run directory?") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read ({exc.strerror or exc}); the run directory is damaged") from None
    for n, line in _lines(path, end):  # text first: an error names the first line not text
        _parse_line(path, n, line)
    header = next(_lines(path, end), None)
    if header is None or tuple(_parse_line(path, 1, header[1])) != COLUMNS:
        raise UserError(f"{path}: header is not the benchkit points header; the file is damaged or not from benchkit")
    checker = _ChainCheck(d, n_lines) if chain and (d / CHAIN_FILE).exists() else None
    kept = checker.kept if checker is not None else n_lines
    n_rows, last, pos = 0, None, 0
    try:
        for n, line in _lines(path, end):
            row = _row(path, n, line) if n > 1 else None
            if checker is not None:
                checker.check(n, line)
            if n > kept:  # the last row's digest never reached the disk: the point in progress
                break
            pos += len(line)
            if row is not None:
                last, n_rows = row, n_rows + 1
    finally:
        if checker is not None:
            checker.close()
    return PointsScan(n_rows, pos, last, checker.prev if checker is not None else None)


class _ChainCheck:
    """points.chain read alongside points.csv, one digest per line."""

    def __init__(self, d: Path, n_lines: int):
        self.path, self.cpath = d / POINTS_FILE, d / CHAIN_FILE
        try:
            size = self.cpath.stat().st_size
            self._fh = open(self.cpath, "rb")
        except OSError as exc:
            raise UserError(f"{self.cpath}: cannot read ({exc.strerror or exc}); the run directory is damaged") from None
        self.n_dig = size // _DIGEST_LINE
        if not (n_lines - 1 <= self.n_dig <= n_lines + 1):
            self._fh.close()
            raise UserError(f"{self.path}: {n_lines} lines but {self.cpath.name} holds {self.n_dig} digests; "
                            "lines were added or removed after they were written: restore the file")
        self.kept = min(self.n_dig, n_lines)
        self.prev = chain_start(str(read_run(d).get("run_id")))

    def close(self) -> None:
        self._fh.close()

    def check(self, k: int, line: bytes) -> None:
        if k > self.n_dig:
            return
        h = chain_next(self.prev, line)
        if h.hex().encode("ascii") != self._fh.read(_DIGEST_LINE)[:64]:
            raise UserError(f"{self.path}: line {k} differs from the line written during the run (its "
                            f"digest in {self.cpath.name} does not match); the row was edited or damaged: "
                            "restore the original file or measure again")
        self.prev = h


class StoredRows:
    """The rows a run already holds, as a resume reads them: counted once, streamed from disk
    on each pass (checked again each time), never all in memory at once."""

    def __init__(self, run_dir: str | os.PathLike, scan: PointsScan):
        self._dir, self._scan = Path(run_dir), scan

    def __len__(self) -> int:
        return self._scan.n_rows

    def __iter__(self):
        return iter_rows(self._dir, self._scan.end)

    @property
    def last(self) -> dict[str, str] | None:
        return self._scan.last


def chain_start(run_id: str) -> bytes:
    return hashlib.sha256(f"benchkit-points-chain\n{run_id}".encode("utf-8")).digest()


def chain_next(prev: bytes, line: bytes) -> bytes:
    return hashlib.sha256(prev + line).digest()


def check_chain(run_dir: str | os.PathLike, end: int | None = None) -> int:
    """Check points.csv's complete lines (up to byte `end`) against points.chain; returns how
    many lines carry a matching digest (all, or all but the last when the run stopped between
    writing a row and its digest). UserError naming the first line whose digest differs."""
    d = Path(run_dir)
    n_lines, full_end = _complete_end(d / POINTS_FILE)
    end = full_end if end is None else end
    if end < full_end:
        n_lines = sum(1 for _ in _lines(d / POINTS_FILE, end))
    checker = _ChainCheck(d, n_lines)
    try:
        for n, line in _lines(d / POINTS_FILE, end):
            checker.check(n, line)
    finally:
        checker.close()
    return checker.kept


def read_run(run_dir: str | os.PathLike) -> dict:
    """run.json of a run directory, checked to be one."""
    path = Path(run_dir) / RUN_FILE
    try:
        meta = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"{path}: not found; give the directory a 'benchkit measure --out' created") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{path}: unreadable ({exc}); the run directory is damaged") from None
    except RecursionError:  # json nests deeper than Python recurses: not a run record either
        raise UserError(f"{path}: unreadable (nested too deeply to be a run record); the run directory is damaged") from None
    if not isinstance(meta, dict) or meta.get("format") != RUN_FORMAT or meta.get("version") != RUN_VERSION:
        raise UserError(f"{path}: not a {RUN_FORMAT} version {RUN_VERSION} file")
    return meta


class RunLog:
    """Owns one run directory while a sweep writes into it (an exclusive lock on points.csv)."""

    def __init__(self, run_dir: Path, meta: dict, fh, rows, chain_fh=None,
                 chain_prev: bytes | None = None, lock=None):
        self.dir = run_dir
        self.meta = meta
        self._fh = fh
        self._lock_held = lock
        self._chain = chain_fh
        self._prev = chain_start(str(meta.get("run_id"))) if chain_prev is None else chain_prev
        self.rows = rows  # rows already in points.csv before this session (StoredRows on resume)
        self.flag_samples: dict[str, tuple[str, ...]] = {}  # flags every row of a sample carries
        self._syncer: ThreadPoolExecutor | None = None  # the one thread that fsyncs rows
        self._pending = None  # (row start, digest start, digest before, future) of the last row

    # -- opening -------------------------------------------------------------
    @classmethod
    def create(cls, run_dir: str | os.PathLike, meta: dict) -> "RunLog":
        """New run directory with the header and run.json (status running)."""
        d = Path(run_dir)
        if d.exists() and (not d.is_dir() or any(d.iterdir())):
            raise UserError(f"{d}: already exists and is not empty; choose a new --out, or --resume {d}")
        created = not d.exists()
        fh = cfh = lock = log = None
        try:
            d.mkdir(parents=True, exist_ok=True)
            fh = open(d / POINTS_FILE, "a+", encoding="utf-8", newline="")
            lock = cls._lock(fh, d)
            meta["points_chain"] = CHAIN_FILE
            cfh = open(d / CHAIN_FILE, "a+", encoding="ascii", newline="")  # written by os.write
            log = cls(d, meta, fh, [], cfh, lock=lock)
            log._append_bytes((",".join(COLUMNS) + "\n").encode("utf-8"))
            log.save()
        except (OSError, RunFileError) as exc:
            # nothing half written: take back what was made, then one line for the operator
            if log is not None and log._syncer is not None:
                log._syncer.shutdown(wait=True)
            if cfh is not None:
                cfh.close()
            if fh is not None:
                fh.close()
                if lock is not None:
                    lock.release()
                for name in (POINTS_FILE, CHAIN_FILE, RUN_FILE, LOCK_FILE):
                    try:
                        (d / name).unlink()
                    except OSError:
                        pass
            if created:
                try:
                    d.rmdir()
                except OSError:
                    pass
            why = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
            raise UserError(f"{d}: cannot create the run directory ({why}); choose an --out "
                            "on a disk with free space, in a folder you can write") from None
        _fsync_dir(d)
        return log

    @classmethod
    def reopen(cls, run_dir: str | os.PathLike) -> "RunLog":
        """An interrupted run for resume: drops a trailing partial line of points.csv."""
        d = Path(run_dir)
        meta = read_run(d)
        path = d / POINTS_FILE
        try:
            fh = open(path, "r+", encoding="utf-8", newline="")
        except FileNotFoundError:
            raise UserError(f"{path}: not found; is {d} a run directory?") from None
        lock = cls._lock(fh, d)
        try:
            cpath = d / CHAIN_FILE
            if meta.get("points_chain") != CHAIN_FILE or not cpath.exists():
                raise UserError(f"{cpath}: missing; without its row digests the rows of this run "
                                "cannot be checked, so it is not resumed: start a new run")
            scan = scan_points(d)
            end, n_lines = scan.end, scan.n_rows + 1
            chain_fh = open(cpath, "r+b")
        except BaseException:
            fh.close()
            cls._unlock(lock, d)
            raise
        try:
            if path.stat().st_size != end:
                with open(path, "r+b") as raw:
                    raw.truncate(end)
                    raw.flush()
                    os.fsync(raw.fileno())
            chain_fh.truncate(n_lines * _DIGEST_LINE)  # a digest whose row never reached the disk
            os.fsync(chain_fh.fileno())
        except OSError as exc:
            fh.close()
            chain_fh.close()
            cls._unlock(lock, d)
            raise UserError(_write_problem(path, exc)) from None
        chain_fh.seek(0, os.SEEK_END)
        fh.seek(0, os.SEEK_END)
        return cls(d, meta, fh, StoredRows(d, scan), chain_fh, scan.prev, lock=lock)

    @staticmethod
    def _lock(fh, d: Path):
        """One writer per run directory, on every platform filelock serves (imported here,
        so building the CLI needs no platform module)."""
        from filelock import FileLock, Timeout

        path = d / LOCK_FILE
        lock = FileLock(str(path), timeout=0)
        made = not path.exists()
        try:
            lock.acquire()
        except Timeout:
            fh.close()
            raise UserError(f"{d}: another benchkit process is writing this run; wait for it or stop it first") from None
        lock.benchkit_made = made  # the writer that made the file takes it away again on close
        return lock

    @staticmethod
    def _unlock(lock, d: Path) -> None:
        """Release; the writer that made the lock file takes it away, so the folder is left as
        it was found (a refused resume changes nothing there)."""
        lock.release()
        if getattr(lock, "benchkit_made", False):
            with contextlib.suppress(OSError):
                (d / LOCK_FILE).unlink()

    # -- writing -------------------------------------------------------------
    def append_point(self, row: Mapping[str, Any]) -> None:
        """One row, on disk (fsync) before this returns; RunFileError if it cannot be."""
        extra = self.flag_samples.get(row.get("sample_id"))
        if extra:
            row["flags"] = join_flags([*filter(None, str(row["flags"] or "").split(";")), *extra])
        self._append_bytes(row_line(row).encode("utf-8"))

    def _append_bytes(self, data: bytes) -> None:
        """Write straight to the file (no buffer that could be flushed half later) once the
        row before is confirmed on disk; its own fsync then runs in the background (sync()).
        On failure cut the file back, so it holds whole confirmed rows only."""
        self.sync()
        fd = self._fh.fileno()
        start = os.lseek(fd, 0, os.SEEK_END)
        cfd = self._chain.fileno() if self._chain is not None else None
        cstart = os.lseek(cfd, 0, os.SEEK_END) if cfd is not None else 0
        digest = chain_next(self._prev, data)
        try:
            _write_all(fd, data)
            if cfd is not None:
                _write_all(cfd, digest.hex().encode("ascii") + b"\n")
        except OSError as exc:
            self._cut_back(fd, start, cfd, cstart)
            raise RunFileError(_write_problem(self.dir / POINTS_FILE, exc)) from None
        if self._syncer is None:
            self._syncer = ThreadPoolExecutor(max_workers=1, thread_name_prefix="benchkit-rowsync")
        self._pending = (start, cstart, self._prev, self._syncer.submit(_fsync_all, fd, cfd))
        self._prev = digest

    def sync(self) -> None:
        """Wait until the last row written is on disk (fsync confirmed); RunFileError, with
        that row cut off again, if it could not be."""
        pending, self._pending = self._pending, None
        if pending is None:
            return
        start, cstart, prev, done = pending
        try:
            done.result()
        except OSError as exc:
            fd = self._fh.fileno()
            cfd = self._chain.fileno() if self._chain is not None else None
            self._cut_back(fd, start, cfd, cstart)
            self._prev = prev
            raise RunFileError(_write_problem(self.dir / POINTS_FILE, exc)) from None

    @staticmethod
    def _cut_back(fd, start, cfd, cstart) -> None:
        for f, at in ((fd, start), (cfd, cstart)):
            if f is not None:
                try:
                    os.ftruncate(f, at)
                except OSError:
                    pass  # a partial last line is dropped when the run is resumed

    def event(self, t_s: float | None, kind: str, **fields: Any) -> None:
        entry = {"utc": utc_now(), "t_s": t_s, "event": kind}
        entry.update(fields)
        self.meta.setdefault("events", []).append(entry)

    def set_status(self, status: str, reason: str | None = None) -> None:
        self.meta["status"] = status
        self.meta["reason"] = reason
        if status in ("complete", "aborted"):
            self.sync()  # the rows the digest covers are on disk first
            self.meta["end_utc"] = utc_now()
            self.meta["points_sha256"] = sha256_file(self.dir / POINTS_FILE) if status == "complete" else None
        else:
            self.meta["end_utc"] = None
            self.meta["points_sha256"] = None
        self.save()

    def save(self) -> None:
        """run.json, replaced atomically, after the rows it may count are on disk."""
        self.sync()
        try:
            write_text_atomic(self.dir / RUN_FILE, json.dumps(self.meta, indent=2, allow_nan=False) + "\n")
        except UserError as exc:  # benchkit.atomic's one line: disk full, read-only, I/O error
            raise RunFileError(str(exc)) from None

    def close(self) -> None:
        try:
            self.sync()
        except RunFileError:
            # closing is the way out of a run that ended already (its status said or not
            # writable): the row is cut back, and a resume measures that point again
            pass
        finally:
            if self._syncer is not None:
                self._syncer.shutdown(wait=True)
                self._syncer = None
        if self._chain is not None and not self._chain.closed:
            self._chain.close()
        if self._fh is not None and not self._fh.closed:
            self._fh.close()
        if self._lock_held is not None:
            self._unlock(self._lock_held, self.dir)
            self._lock_held = None


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _fsync_all(fd: int, cfd: int | None) -> None:
    """A row and its digest onto the disk (run in the row-sync thread)."""
    os.fsync(fd)
    if cfd is not None:
        os.fsync(cfd)


def _fsync_dir(d: Path) -> None:
    """Make the new directory entries durable too."""
    try:
        fd = os.open(d, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)
