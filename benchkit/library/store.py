"""The in-house curve library: parts, samples, runs, curves and verdicts, in one SQLite file or
on a PostgreSQL server.

Why two backends behind one class: a bench or a designer's laptop keeps one SQLite file
(WAL, IMMEDIATE transactions, retries on busy) that copies and merges cleanly; a lab with
several benches and sites shares one PostgreSQL database (`postgresql://...`, postgres.py).
Both hold the same schema version and give the same answers. Every statement is
parameterised; part ids and sample ids are stored and matched literally, whatever they hold.

Identity: a run is its points.csv sha256, a curve or a verdict the sha256 of its canonical
JSON document. Adding or merging the same thing twice, from any site in any order, stores it
once. Records are not edited: a revised curve is a new record, the table `revision` names the one it
supersedes.
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable

import numpy as np

from benchkit.catalogue.codes import REFERENCE_TEMP_C
from benchkit.errors import UserError
from benchkit.library import fitsbridge, pack, schema
from benchkit.library.connection import open_connection
from benchkit.library.records import CurveRecord, PartRecord, check_part_id
from benchkit.library.table import branch_code

# Curves without a stated temperature are taken at the reference temperature [standard: IEC 60384-1].

_PART_COLUMNS = "part_id, description, nominal_C_F, tolerance, rated_V, class_code, case_code, supplier"
_CURVE_SELECT = (
    "SELECT c.id, c.part_id, c.origin, c.model, c.sample_id, c.branch, c.temp_C, c.valid_lo_V, "
    "c.valid_hi_V, c.freq_Hz, c.ac_level_Vrms, c.function, c.esr_ohm, c.content_sha256, "
    "r.points_sha256, r.path, d.document FROM curve c JOIN curve_doc d ON d.curve_id = c.id "
    "LEFT JOIN run r ON r.id = c.run_ref"
)


def _utc() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


def _part_from_row(row) -> PartRecord:
    return PartRecord(*row)


def _curve_from_row(row) -> CurveRecord:
    (cid, pid, origin, model, sample_id, branch, temp, lo, hi, freq, ac, function, esr, sha,
     psha, rpath, doc) = row
    return CurveRecord(cid, pid, origin, model, sample_id, branch, temp, (lo, hi), freq, ac,
                       function, esr, sha, psha, rpath, doc)


@dataclass
class RunInfo:
    """What the library keeps of a run directory: where it was, its data's hash, its manifest."""

    points_sha256: str
    run_id: str | None
    path: str | None
    status: str | None
    manifest: dict[str, Any]


_VERDICT_COLUMNS = "content_sha256, part_id, verdict, rule, document, added_utc"
_BULK_ROWS = 400  # curves per statement of the benchmark's bulk insert
_BULK_RANGE = range(_BULK_ROWS)
_ONE_ROW = "(" + ", ".join("?" for _ in range(20)) + ")"  # one row of Library._CURVE_COLUMNS
_BULK_DOC_INSERT = f"INSERT INTO curve_doc(curve_id, document) VALUES {', '.join('(?, ?)' for _ in _BULK_RANGE)}"


def _part_rank(row: tuple) -> tuple:
    """Which of two versions of a part a merge keeps: changed last, then the larger fields (JSON)."""
    return (row[9] or "", json.dumps(list(row[:8])))


@dataclass
class ImportSummary:
    parts_added: int = 0
    parts_kept: int = 0  # present here with other catalogue fields: ours kept (changed later)
    parts_updated: int = 0  # present here, changed later there: theirs taken
    verdicts_added: int = 0
    runs_added: int = 0
    curves_added: int = 0
    curves_present: int = 0


def _number(v: Any, where: str, name: str) -> float | None:
    if v is None:
        return None
    try:
        x = float(v)
    except (TypeError, ValueError):
        raise UserError(f"{where}: field {name!r} must be a number, got {v!r}") from None
    if not np.isfinite(x):
        raise UserError(f"{where}: field {name!r} must be finite, got {v!r}")
    return x


def curve_columns(doc: dict[str, Any], where: str) -> dict[str, Any]:
    """The numbers the query needs, unpacked from a (validated) curve document."""
    model = doc.get("model")
    names = list(doc.get("param_names") or [])
    params = doc.get("params") or {}
    origin = doc.get("origin") or "measured"
    if origin not in schema.ORIGINS:
        raise UserError(f"{where}: field 'origin' must be one of {', '.join(schema.ORIGINS)}, got {origin!r}")
    try:
        lo, hi = (float(x) for x in doc["valid_range_V"])
    except (KeyError, TypeError, ValueError):
        raise UserError(f"{where}: field 'valid_range_V' must be [low, high] in volts") from None
    conditions = doc.get("conditions") or {}
    temp = _number(conditions.get("temp_C"), where, "conditions.temp_C")
    source = doc.get("source") or {}
    values = [params.get(n) for n in names]
    scalar = bool(names) and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in values)
    params_blob = np.asarray(values, dtype="<f8").tobytes() if scalar else None
    cov_blob = None
    cov = doc.get("covariance")
    if scalar and cov is not None:
        try:
            c = np.asarray(cov, dtype="<f8")
        except (TypeError, ValueError):
            c = None
        if c is not None and c.shape == (len(names), len(names)) and np.all(np.isfinite(c)):
            cov_blob = c.tobytes()
    temp_C = REFERENCE_TEMP_C if temp is None else temp
    return {
        "numbers_f64": np.array([lo, hi, temp_C, schema.ORIGINS.index(origin),
                                 branch_code(doc.get("branch") or source.get("branch")),
                                 _number(doc.get("model_error_F"), where, "model_error_F") or 0.0,
                                 *pack.choice_numbers(doc.get("model_choice_u_F"))],
                                dtype="<f8").tobytes(),  # pack.N_NUMBERS, in this order
        "model": str(model),
        "param_names": json.dumps(names),
        "params_f64": params_blob,
        "covariance_f64": cov_blob,
        "valid_lo_V": lo,
        "valid_hi_V": hi,
        "temp_C": temp_C,
        "freq_Hz": _number(conditions.get("freq_Hz"), where, "conditions.freq_Hz"),
        "ac_level_Vrms": _number(conditions.get("ac_level_Vrms"), where, "conditions.ac_level_Vrms"),
        "function": conditions.get("function"),
        "branch": doc.get("branch") or source.get("branch"),
        "sample_id": doc.get("sample_id") or source.get("sample_id"),
        "origin": origin,
    }


class Library:
    """An in-house curve library file.

    `Library(path)` opens (and creates, unless create=False) the file at `path`; path None
    means `default_library_path()` ($BENCHKIT_LIBRARY or ~/.local/share/benchkit/library.sqlite),
    ":memory:" an in-memory library (tests, benchmarks).
    """

    def __init__(self, path: str | os.PathLike | None = None, *, create: bool = True,
                 busy_timeout_s: float = schema.DEFAULT_BUSY_TIMEOUT_S, readonly: bool = False):
        if path is None:
            path = schema.default_library_target()
        self._db = open_connection(path, create=create, busy_timeout_s=busy_timeout_s, readonly=readonly)
        self.kind = self._db.kind  # "sqlite" or "postgresql"
        self.path = self._db.path  # None for an in-memory or a PostgreSQL library
        self.where = self._db.where
        self.created = bool(getattr(self._db, "created", False))  # this open made a new file
        # what reopens this library (a path or the URL as given, password included: never printed)
        self.target = str(path) if schema.is_url(path) else (str(self.path) if self.path else str(path))
        self._table = None  # cached query arrays (benchkit.library.query.CurveTable)

    # -- life cycle ---------------------------------------------------------------------------
    def close(self) -> None:
        self._db.close()

    def discard_new_file(self) -> None:
        """Remove the file this Library created (after a failed first command): no empty file left."""
        if not self.created or self.path is None:
            return
        for suffix in ("", "-wal", "-shm", "-journal"):
            try:
                Path(str(self.path) + suffix).unlink()
            except FileNotFoundError:
                pass

    def __enter__(self) -> "Library":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    @property
    def generation(self) -> int:
        """Changes whenever any process commits a change to this library."""
        return self._db.generation()

    # -- parts --------------------------------------------------------------------------------
    def add_parts(self, parts: Iterable[Any]) -> dict[str, int]:
        """Insert new parts, update changed ones; one transaction. Returns counts by outcome."""
        records = [PartRecord.from_any(p) for p in parts]
        counts = {"added": 0, "updated": 0, "unchanged": 0}
        with self._db.write() as conn:
            for rec in records:
                row = conn.execute(f"SELECT {_PART_COLUMNS} FROM part WHERE part_id = ?", (rec.part_id,)).fetchone()
                values = (rec.part_id, rec.description, rec.nominal_C_F, rec.tolerance, rec.rated_V,
                          rec.class_code, rec.case, rec.supplier)
                if row is None:
                    conn.execute(
                        f"INSERT INTO part({_PART_COLUMNS}, added_utc, updated_utc) "
                        f"VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                        values + (_utc(), _utc()),
                    )
                    counts["added"] += 1
                elif tuple(row) == values:
                    counts["unchanged"] += 1
                else:
                    conn.execute(
                        "UPDATE part SET description = ?, nominal_C_F = ?, tolerance = ?, rated_V = ?, "
                        "class_code = ?, case_code = ?, supplier = ?, updated_utc = ? WHERE part_id = ?",
                        values[1:] + (_utc(), rec.part_id),
                    )
                    counts["updated"] += 1
        return counts

    def add_part(self, part: Any) -> str:
        """One part; returns 'added', 'updated' or 'unchanged'."""
        counts = self.add_parts([part])
        return next(k for k, v in counts.items() if v)

    def parts(self, *, case: str | None = None, class_code: str | None = None) -> list[PartRecord]:
        sql = f"SELECT {_PART_COLUMNS} FROM part"
        where, args = [], []
        if case is not None:
            where.append("case_code = ?")
            args.append(case)
        if class_code is not None:
            where.append("class_code = ?")
            args.append(class_code)
        if where:
            sql += " WHERE " + " AND ".join(where)
        sql += " ORDER BY part_id"
        return [_part_from_row(r) for r in self._db.conn.execute(sql, args)]

    def part(self, part_id: str) -> PartRecord:
        row = self._db.conn.execute(f"SELECT {_PART_COLUMNS} FROM part WHERE part_id = ?", (part_id,)).fetchone()
        if row is None:
            raise UserError(self._missing_part(part_id))
        return _part_from_row(row)

    def has_part(self, part_id: str) -> bool:
        return self._db.conn.execute("SELECT 1 FROM part WHERE part_id = ?", (part_id,)).fetchone() is not None

    def _missing_part(self, part_id: str) -> str:
        return (f"part {part_id!r} is not in the library {self.where}; add it first with "
                f"'benchkit library add-parts PARTS.toml' (see 'benchkit library list')")

    def remove_part(self, part_id: str) -> int:
        """Remove a part with its samples and curves; returns the number of curves removed."""
        with self._db.write() as conn:
            if conn.execute("SELECT 1 FROM part WHERE part_id = ?", (part_id,)).fetchone() is None:
                raise UserError(self._missing_part(part_id))
            n = conn.execute("SELECT COUNT(*) FROM curve WHERE part_id = ?", (part_id,)).fetchone()[0]
            conn.execute("DELETE FROM part WHERE part_id = ?", (part_id,))  # cascades to samples, curves
            self._drop_orphan_runs(conn)
            pack.rebuild(conn)
        return int(n)

    # -- curves -------------------------------------------------------------------------------
    def add_curve(self, curve: Any, part_id: str | None = None, *, esr_ohm: float | None = None,
                  where: str = "curve") -> tuple[int, bool]:
        """Store one curve (a fits.Curve or its document as a dict) for a part already in the library.

        Returns (curve id, added); added is False when the same curve was already stored.
        """
        [(cid, added)] = self.add_curves([(curve, esr_ohm)], part_id=part_id, where=where)
        return cid, added

    def add_curves(self, items: Iterable[tuple[Any, float | None]], *, part_id: str | None = None,
                   run: RunInfo | None = None, where: str = "curve", new_parts: Iterable[Any] = (),
                   supersedes: str | None = None) -> list[tuple[int, bool]]:
        """Several curves (and the run they come from) in one transaction: all land or none.

        new_parts: catalogue records to add in the same transaction when not yet in the
        library (a run's own run.json copy of its parts). supersedes: the content hash of the
        record these curves revise.
        """
        new_parts = [PartRecord.from_any(p) for p in new_parts]
        prepared = []
        for curve, esr in items:
            doc = dict(curve) if isinstance(curve, dict) else fitsbridge.curve_document(curve)
            pid = part_id if part_id is not None else doc.get("part_id")
            if not pid:
                raise UserError(f"{where}: the curve names no part; give --part ID")
            if doc.get("part_id") not in (None, "", pid):
                raise UserError(f"{where}: the curve is for part {doc.get('part_id')!r}, not {pid!r}; "
                                f"check --part")
            doc["part_id"] = pid
            fitsbridge.curve_from_dict(doc, where)  # validates the document (fits rules)
            cols = curve_columns(doc, where)
            esr = _number(esr, where, "esr_ohm")
            prepared.append((pid, doc, cols, esr))
        out = []
        packed: list[dict] = []
        with self._db.write() as conn:
            for rec in new_parts:
                conn.execute(f"INSERT OR IGNORE INTO part({_PART_COLUMNS}, added_utc, updated_utc) "
                             f"VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                             (rec.part_id, rec.description, rec.nominal_C_F, rec.tolerance, rec.rated_V,
                              rec.class_code, rec.case, rec.supplier, _utc(), _utc()))
            run_ref = self._insert_run(conn, run) if run is not None else None
            for pid, doc, cols, esr in prepared:
                if conn.execute("SELECT 1 FROM part WHERE part_id = ?", (pid,)).fetchone() is None:
                    raise UserError(self._missing_part(pid))
                out.append(self._insert_curve(conn, pid, doc, cols, esr, run_ref, packed, supersedes))
            pack.append(conn, packed)
        return out

    def _insert_run(self, conn, run: RunInfo) -> int:
        conn.execute(
            "INSERT OR IGNORE INTO run(points_sha256, run_id, path, status, manifest, added_utc) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            (run.points_sha256, run.run_id, run.path, run.status,
             json.dumps(run.manifest, sort_keys=True), _utc()),
        )
        return conn.execute("SELECT id FROM run WHERE points_sha256 = ?", (run.points_sha256,)).fetchone()[0]

    @staticmethod
    def _sample_ref(conn, part_id: str, sample_id: str | None) -> int | None:
        if not sample_id:
            return None
        conn.execute("INSERT OR IGNORE INTO sample(part_id, sample_id) VALUES (?, ?)", (part_id, sample_id))
        return conn.execute("SELECT id FROM sample WHERE part_id = ? AND sample_id = ?",
                            (part_id, sample_id)).fetchone()[0]

    _CURVE_COLUMNS = ("content_sha256", "part_id", "sample_ref", "run_ref", "origin", "model", "param_names",
                      "params_f64", "covariance_f64", "valid_lo_V", "valid_hi_V", "temp_C", "numbers_f64",
                      "freq_Hz", "ac_level_Vrms", "function", "branch", "sample_id", "esr_ohm", "added_utc")
    _CURVE_INSERT = (f"INSERT INTO curve({', '.join(_CURVE_COLUMNS)}) "
                     f"VALUES ({', '.join('?' for _ in _CURVE_COLUMNS)}) RETURNING id")
    assert len(_CURVE_COLUMNS) == 20  # _ONE_ROW
    _BULK_INSERT = (f"INSERT INTO curve({', '.join(_CURVE_COLUMNS)}) VALUES "
                    f"{', '.join(_ONE_ROW for _ in _BULK_RANGE)} RETURNING id, content_sha256")

    def _insert_curve(self, conn, pid, doc, cols, esr, run_ref, packed, supersedes=None) -> tuple[int, bool]:
        text = fitsbridge.canonical_json(doc)
        sha = hashlib.sha256(text.encode("utf-8")).hexdigest()  # identity: the canonical document
        if supersedes is not None and supersedes != sha:
            conn.execute("INSERT OR IGNORE INTO revision(new_sha256, old_sha256) VALUES (?, ?)", (sha, supersedes))
        row = conn.execute("SELECT id FROM curve WHERE content_sha256 = ?", (sha,)).fetchone()
        if row is not None:
            return int(row[0]), False
        values = dict(cols, content_sha256=sha, part_id=pid, sample_ref=self._sample_ref(conn, pid, cols["sample_id"]),
                      run_ref=run_ref, esr_ohm=esr, added_utc=_utc())
        return self._insert_values(conn, values, text, packed), True

    def _insert_values(self, conn, values: dict[str, Any], document: str, packed: list[dict]) -> int:
        cid = int(conn.execute(self._CURVE_INSERT, tuple(values[c] for c in self._CURVE_COLUMNS)).fetchone()[0])
        conn.execute("INSERT INTO curve_doc(curve_id, document) VALUES (?, ?)", (cid, document))
        packed.append(dict(values, id=cid))
        return cid

    def _insert_trusted(self, docs: list[dict[str, Any]]) -> None:
        """Bulk insert of documents this program generated itself (the benchmark's synthetic library).

        Skips the fits validation of each document; everything else (columns, canonical
        text, identity hash) is as add_curves stores it. No samples, no runs.
        """
        rows = []
        for doc in docs:
            cols = curve_columns(doc, "synthetic curve")
            text = fitsbridge.canonical_json(doc)
            rows.append((dict(cols, content_sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
                              part_id=doc["part_id"], sample_ref=None, run_ref=None, esr_ohm=None,
                              added_utc=_utc()), text))
        packed: list[dict] = []
        n_bulk = len(rows) - len(rows) % _BULK_ROWS
        with self._db.write() as conn:
            for i in range(0, n_bulk, _BULK_ROWS):  # multi-row statements: one round trip per _BULK_ROWS
                chunk = rows[i:i + _BULK_ROWS]
                got = conn.execute(self._BULK_INSERT, [v[c] for v, _ in chunk for c in self._CURVE_COLUMNS]).fetchall()
                ids = {sha: int(cid) for cid, sha in got}
                conn.execute(_BULK_DOC_INSERT, [x for v, text in chunk for x in (ids[v["content_sha256"]], text)])
                packed.extend(dict(v, id=ids[v["content_sha256"]]) for v, _ in chunk)
            for values, text in rows[n_bulk:]:
                self._insert_values(conn, values, text, packed)
            pack.append(conn, packed)

    def curves(self, part_id: str | None = None) -> list[CurveRecord]:
        if part_id is None:
            rows = self._db.conn.execute(_CURVE_SELECT + " ORDER BY c.part_id, c.id")
        else:
            rows = self._db.conn.execute(_CURVE_SELECT + " WHERE c.part_id = ? ORDER BY c.id", (part_id,))
        return [_curve_from_row(r) for r in rows]

    def curve(self, curve_id: int) -> CurveRecord:
        row = self._db.conn.execute(_CURVE_SELECT + " WHERE c.id = ?", (int(curve_id),)).fetchone()
        if row is None:
            raise UserError(f"curve {curve_id} is not in the library {self.where}; see 'benchkit library show PART'")
        return _curve_from_row(row)

    def remove_curve(self, curve_id: int) -> None:
        with self._db.write() as conn:
            if conn.execute("SELECT 1 FROM curve WHERE id = ?", (int(curve_id),)).fetchone() is None:
                raise UserError(f"curve {curve_id} is not in the library {self.where}; nothing removed")
            conn.execute("DELETE FROM curve WHERE id = ?", (int(curve_id),))
            self._drop_orphan_runs(conn)
            pack.rebuild(conn)

    @staticmethod
    def _drop_orphan_runs(conn) -> None:
        conn.execute("DELETE FROM run WHERE id NOT IN (SELECT run_ref FROM curve WHERE run_ref IS NOT NULL)")

    # -- runs ---------------------------------------------------------------------------------
    def runs(self) -> list[RunInfo]:
        rows = self._db.conn.execute("SELECT points_sha256, run_id, path, status, manifest FROM run ORDER BY id")
        return [RunInfo(r[0], r[1], r[2], r[3], json.loads(r[4])) for r in rows]

    def has_run(self, points_sha256: str, part_id: str | None = None) -> bool:
        """True if curves of this run (of this part, when given) are stored."""
        sql = "SELECT 1 FROM curve c JOIN run r ON r.id = c.run_ref WHERE r.points_sha256 = ?"
        args: list[Any] = [points_sha256]
        if part_id is not None:
            sql += " AND c.part_id = ?"
            args.append(part_id)
        return self._db.conn.execute(sql + " LIMIT 1", args).fetchone() is not None

    def add_run(self, run_dir: str | os.PathLike, part_id: str | None = None, *, model: str = "auto",
                allow_incomplete: bool = False):
        """Fit a run directory's points (model auto) and store the run and its curves."""
        from benchkit.library.ingest import add_run_dir

        return add_run_dir(self, Path(run_dir), part_id, model=model, allow_incomplete=allow_incomplete)

    # -- merging ------------------------------------------------------------------------------
    def import_library(self, other: str | os.PathLike) -> ImportSummary:
        """Merge another library (a file or a postgresql:// URL) into this one.

        Order-free: merging A into B and B into A give the same library. Curves, verdicts and
        runs are matched by content hash; a part whose catalogue fields differ keeps the
        version changed last (updated_utc), ties going to the larger canonical text.
        """
        if schema.is_url(other):
            from benchkit.library.postgres import redact

            if redact(str(other)) == self.where:
                raise UserError(f"{self.where}: is this library itself; nothing to import")
            src = open_connection(str(other), create=False, readonly=True)
            label = src.where
        else:
            other_path = Path(other).expanduser()
            if self.path is not None and other_path.exists() and self.path.exists() \
                    and os.path.samefile(other_path, self.path):
                raise UserError(f"{other_path}: is this library itself; nothing to import")
            src = open_connection(other_path, create=False, readonly=True)
            label = str(other_path)
        summary = ImportSummary()
        try:
            with src.read() as s:
                parts = list(s.execute(f"SELECT {_PART_COLUMNS}, added_utc, updated_utc FROM part ORDER BY part_id"))
                runs = list(s.execute("SELECT id, points_sha256, run_id, path, status, manifest, added_utc FROM run"))
                cols = ", ".join(f"c.{c}" for c in self._CURVE_COLUMNS)
                curves = list(s.execute(f"SELECT {cols}, d.document FROM curve c "
                                        f"JOIN curve_doc d ON d.curve_id = c.id ORDER BY c.id"))
                verdicts = list(s.execute(f"SELECT {_VERDICT_COLUMNS} FROM verdict ORDER BY id"))
                revisions = list(s.execute("SELECT new_sha256, old_sha256 FROM revision"))
        finally:
            src.close()
        for row in parts:
            check_part_id(row[0], f"{label}: part {row[0]!r}")
        packed: list[dict] = []
        with self._db.write() as conn:
            for row in parts:
                row = tuple(row)
                mine = conn.execute(f"SELECT {_PART_COLUMNS}, added_utc, updated_utc FROM part WHERE part_id = ?",
                                    (row[0],)).fetchone()
                if mine is None:
                    conn.execute(f"INSERT INTO part({_PART_COLUMNS}, added_utc, updated_utc) "
                                 f"VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)", row)
                    summary.parts_added += 1
                elif tuple(mine[:8]) != row[:8]:
                    if _part_rank(row) > _part_rank(tuple(mine)):
                        conn.execute("UPDATE part SET description = ?, nominal_C_F = ?, tolerance = ?, rated_V = ?, "
                                     "class_code = ?, case_code = ?, supplier = ?, updated_utc = ? WHERE part_id = ?",
                                     row[1:8] + (row[9], row[0]))
                        summary.parts_updated += 1
                    else:
                        summary.parts_kept += 1
            run_map: dict[int, int] = {}
            for rid, psha, run_id, rpath, status, manifest, added in runs:
                cur = conn.execute(
                    "INSERT OR IGNORE INTO run(points_sha256, run_id, path, status, manifest, added_utc) "
                    "VALUES (?, ?, ?, ?, ?, ?)", (psha, run_id, rpath, status, manifest, added))
                summary.runs_added += max(cur.rowcount, 0)
                run_map[rid] = conn.execute("SELECT id FROM run WHERE points_sha256 = ?", (psha,)).fetchone()[0]
            for row in curves:
                values = dict(zip(self._CURVE_COLUMNS, row[:-1]))
                if conn.execute("SELECT 1 FROM curve WHERE content_sha256 = ?",
                                (values["content_sha256"],)).fetchone():
                    summary.curves_present += 1
                    continue
                values["sample_ref"] = self._sample_ref(conn, values["part_id"], values["sample_id"])
                values["run_ref"] = run_map.get(values["run_ref"])
                self._insert_values(conn, values, row[-1], packed)
                summary.curves_added += 1
            for new_sha, old_sha in revisions:
                conn.execute("INSERT OR IGNORE INTO revision(new_sha256, old_sha256) VALUES (?, ?)", (new_sha, old_sha))
            for row in verdicts:
                cur = conn.execute(f"INSERT OR IGNORE INTO verdict({_VERDICT_COLUMNS}) "
                                   f"VALUES (?, ?, ?, ?, ?, ?)", tuple(row))
                summary.verdicts_added += max(cur.rowcount, 0)
            self._drop_orphan_runs(conn)
            pack.append(conn, packed)
        return summary

    def fingerprint(self) -> str:
        """sha256 of what the library holds, without local bookkeeping (row ids, paths, times).

        Two libraries with the same fingerprint hold the same parts, runs, curves and verdicts.
        """
        h = hashlib.sha256()
        with self._db.read() as conn:
            for row in conn.execute(f"SELECT {_PART_COLUMNS} FROM part ORDER BY part_id"):
                h.update(json.dumps(["part", *row]).encode())
            for row in conn.execute("SELECT points_sha256, run_id, status FROM run ORDER BY points_sha256"):
                h.update(json.dumps(["run", *row]).encode())
            for row in conn.execute("SELECT new_sha256, old_sha256 FROM revision ORDER BY new_sha256"):
                h.update(json.dumps(["revision", *row]).encode())
            for row in conn.execute("SELECT c.content_sha256, c.part_id, c.esr_ohm, "
                                    "r.points_sha256 FROM curve c LEFT JOIN run r ON r.id = c.run_ref "
                                    "ORDER BY c.content_sha256"):
                h.update(json.dumps(["curve", *row]).encode())
            for row in conn.execute("SELECT content_sha256, part_id FROM verdict ORDER BY content_sha256"):
                h.update(json.dumps(["verdict", *row]).encode())
        return h.hexdigest()

    # -- history ------------------------------------------------------------------------------
    def revise_curve(self, curve_id: int, curve: Any, *, esr_ohm: float | None = None) -> tuple[int, bool]:
        """File a corrected curve as a new record superseding curve_id (which stays, as history)."""
        old = self.curve(curve_id)
        [(cid, added)] = self.add_curves([(curve, esr_ohm if esr_ohm is not None else old.esr_ohm)],
                                         part_id=old.part_id, where=f"revision of curve {curve_id}",
                                         supersedes=old.content_sha256)
        return cid, added

    def history(self, curve_id: int) -> list[CurveRecord]:
        """The curve and the records it superseded, newest first."""
        out = [self.curve(curve_id)]
        seen = {out[0].content_sha256}
        while True:
            row = self._db.conn.execute("SELECT old_sha256 FROM revision WHERE new_sha256 = ?",
                                        (out[-1].content_sha256,)).fetchone()
            if not row or row[0] is None or row[0] in seen:
                return out
            prev = self._db.conn.execute(_CURVE_SELECT + " WHERE c.content_sha256 = ?", (row[0],)).fetchone()
            if prev is None:
                return out
            out.append(_curve_from_row(prev))
            seen.add(out[-1].content_sha256)

    def superseded_ids(self) -> set[int]:
        return {int(r[0]) for r in self._db.conn.execute(
            "SELECT c.id FROM revision r JOIN curve c ON c.content_sha256 = r.old_sha256")}

    # -- verdicts -----------------------------------------------------------------------------
    def add_verdict(self, doc: dict[str, Any], where: str = "verdict") -> tuple[int, bool]:
        """File a verification report (its report.json document); returns (id, added)."""
        if not isinstance(doc, dict) or doc.get("format") != "benchkit-verification":
            raise UserError(f"{where}: not a benchkit verification report (report.json)")
        pid = (doc.get("claim") or {}).get("part_id") or doc.get("part_id")
        if not pid:
            raise UserError(f"{where}: the report names no part")
        text = fitsbridge.canonical_json(doc)
        sha = hashlib.sha256(text.encode("utf-8")).hexdigest()
        with self._db.write() as conn:
            if conn.execute("SELECT 1 FROM part WHERE part_id = ?", (pid,)).fetchone() is None:
                raise UserError(self._missing_part(pid))
            row = conn.execute("SELECT id FROM verdict WHERE content_sha256 = ?", (sha,)).fetchone()
            if row is not None:
                return int(row[0]), False
            vid = conn.execute(f"INSERT INTO verdict({_VERDICT_COLUMNS}) VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
                               (sha, pid, str(doc.get("verdict") or "?"),
                                doc.get("rule") or (doc.get("decision_rule") or {}).get("rule"), text, _utc())).fetchone()[0]
        return int(vid), True

    def verdicts(self, part_id: str) -> list[dict[str, Any]]:
        """The part's verification reports: id, verdict, rule, added_utc and the document."""
        rows = self._db.conn.execute("SELECT id, verdict, rule, added_utc, document FROM verdict "
                                     "WHERE part_id = ? ORDER BY id", (part_id,))
        return [{"id": int(r[0]), "verdict": r[1], "rule": r[2], "added_utc": r[3], "document": json.loads(r[4])}
                for r in rows]

    def verdict(self, verdict_id: int) -> dict[str, Any]:
        row = self._db.conn.execute("SELECT id, part_id, verdict, rule, added_utc, document FROM verdict WHERE id = ?",
                                    (int(verdict_id),)).fetchone()
        if row is None:
            raise UserError(f"verification report {verdict_id} is not in the library {self.where}")
        return {"id": int(row[0]), "part_id": row[1], "verdict": row[2], "rule": row[3], "added_utc": row[4],
                "document": json.loads(row[5])}

    # -- the query ----------------------------------------------------------------------------
    def query(self, bias_V: float, temp_C: float = REFERENCE_TEMP_C, **options):
        """Parts ranked by effective capacitance C(V) at `bias_V` (volts) and `temp_C` (degC).

        Returns QueryResult objects (part, C_F, u_C_F, covered, reason, origin, curve_ids...),
        covered parts by C_F, largest first, then the parts not covered. Rules:
        never extrapolated past a curve's valid range; curves within +-temp_tol_C (default
        2 degC) of temp_C answer, otherwise C is interpolated linearly between the nearest
        curves below and above temp_C, and a temperature outside what the part's curves span is
        not covered; several curves at one temperature are pooled (mean C, u combining the fit
        variance and the spread); origins are not mixed (lot summary, then measured, then
        supplier claim). Options: min_C_F, case, class_code, min_rated_V, nominal_C_F, branch,
        origin, temp_tol_C, limit.
        Full text: benchkit.library.query.
        """
        from benchkit.library.query import run_query

        return run_query(self, bias_V, temp_C, **options)

    def summary(self) -> dict[str, int]:
        conn = self._db.conn
        return {name: conn.execute(f"SELECT COUNT(*) FROM {name}").fetchone()[0]  # table names are constants
                for name in ("part", "sample", "run", "curve", "verdict")}
