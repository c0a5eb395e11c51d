"""The query's column store: the numbers of every curve packed in a few large blobs.

Why: a cold design query over 100,000 curves must not visit 100,000 rows. Every write
transaction that stores curves also appends one segment per model variant to `curve_pack`
(ids, part codes, the query numbers, parameters, covariance as little-endian arrays), in the
same transaction as the rows, so the pack is never out of step with them on either backend.
A cold load reads a handful of segments and hands numpy whole arrays. Segments of one variant
are merged into one once there are more than MAX_SEGMENTS of them; removing curves (rare:
records are otherwise immutable) rebuilds the pack from the rows.

What a segment holds is what the query reads and nothing more, since on a server every byte
crosses the wire on a cold load: the part of each curve as an int32 code into the segment's
own list of distinct part ids (no per-curve text to parse and look up), and the covariance as
its lower triangle (a covariance is symmetric: k(k+1)/2 numbers instead of k^2).

Curves whose parameters are not plain numbers ("loose": a table model's knots...) are packed
without parameters and evaluated one by one from their documents.
"""

from __future__ import annotations

import json
from collections import defaultdict
from dataclasses import dataclass

import numpy as np

MAX_SEGMENTS = 16
SEP = "\x1f"  # part ids hold no control characters (records.check_part_id)
# valid_lo_V, valid_hi_V, temp_C, origin rank, branch code, model_error_F, then the
# CHOICE_NODES values of the model-choice term (store.curve_columns)
CHOICE_NODES = 9  # part of the schema; the same count fits writes (fits.fitting.CHOICE_NODES)
N_NUMBERS = 6 + CHOICE_NODES
N_NUMBERS_V2 = 5  # schema version 2 had no model_error_F
N_NUMBERS_V3 = 6  # schema version 3 had no model-choice term
MODEL_ERROR = 5  # column of model_error_F in the numbers
CHOICE = slice(6, 6 + CHOICE_NODES)  # columns of the model-choice term

_INSERT = ("INSERT INTO curve_pack(model, param_names, loose, n, ids, part_keys, part_codes, numbers, "
           "params, covariance) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)")
_COLUMNS = "n, ids, part_keys, part_codes, numbers, params, covariance"


@dataclass
class Segment:
    """The packed curves of one model variant (or the loose curves), as numpy arrays."""

    model: str
    param_names: tuple[str, ...]
    loose: bool
    ids: np.ndarray          # (n,) int64
    part_keys: list[str]     # distinct part ids of the segment
    part_codes: np.ndarray   # (n,) int32 index into part_keys
    numbers: np.ndarray      # (n, N_NUMBERS)
    params: np.ndarray | None      # (n, k)
    covariance: np.ndarray | None  # (n, k(k+1)/2) lower triangle (tril_indices order), NaN where none

    @property
    def n(self) -> int:
        return int(self.ids.size)

    @property
    def part_ids(self) -> list[str]:
        """One part id per curve (for the few callers that want text, not codes)."""
        return [self.part_keys[c] for c in self.part_codes.tolist()]


def tril(k: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column of each stored covariance element (numpy's lower-triangle order)."""
    return np.tril_indices(k)


def _blob(x) -> bytes:
    return bytes(x) if x is not None else b""


def _triangle(cov_blob, k: int) -> bytes:
    """A curve row's full k x k covariance (or None) as its lower triangle."""
    if cov_blob is None:
        return np.full(k * (k + 1) // 2, np.nan).astype("<f8").tobytes()
    full = np.frombuffer(bytes(cov_blob), dtype="<f8").reshape(k, k)
    return np.ascontiguousarray(full[tril(k)]).astype("<f8").tobytes()


def _codes(part_ids: list[str]) -> tuple[str, bytes]:
    keys: dict[str, int] = {}
    codes = np.fromiter((keys.setdefault(p, len(keys)) for p in part_ids), dtype="<i4", count=len(part_ids))
    return SEP.join(keys), codes.tobytes()


def choice_numbers(values) -> np.ndarray:
    """A curve document's model_choice_u_F as CHOICE_NODES values over its valid range
    (resampled along its straight lines when it has another count; zeros when absent), so
    the query's band follows the curve's own (fits.Curve.u_C)."""
    if not values:
        return np.zeros(CHOICE_NODES)
    v = np.asarray(values, dtype=float)
    if v.size == CHOICE_NODES:
        return v
    return np.interp(np.linspace(0.0, 1.0, CHOICE_NODES), np.linspace(0.0, 1.0, v.size), v)


def append(conn, rows: list[dict]) -> None:
    """Pack freshly inserted curve rows (dicts of id, part_id and the curve columns)."""
    groups: dict[tuple[str, str, int], list[dict]] = defaultdict(list)
    for r in rows:
        groups[(r["model"], r["param_names"], int(r["params_f64"] is None))].append(r)
    for (model, names, loose), items in sorted(groups.items()):
        k = len(json.loads(names))
        ids = np.array([r["id"] for r in items], dtype="<i8").tobytes()
        keys, codes = _codes([r["part_id"] for r in items])
        numbers = b"".join(_blob(r["numbers_f64"]) for r in items)
        if loose:
            params = cov = None
        else:
            params = b"".join(_blob(r["params_f64"]) for r in items)
            cov = b"".join(_triangle(r["covariance_f64"], k) for r in items)
        conn.execute(_INSERT, (model, names, loose, len(items), ids, keys, codes, numbers, params, cov))
        n_seg = conn.execute("SELECT COUNT(*) FROM curve_pack WHERE model = ? AND param_names = ? AND loose = ?",
                             (model, names, loose)).fetchone()[0]
        if n_seg > MAX_SEGMENTS:
            _merge(conn, model, names, loose)


def _join(segs) -> tuple[int, bytes, str, bytes, bytes, bytes | None, bytes | None]:
    """Several stored segments of one variant as one (part codes mapped onto one key list)."""
    n = sum(int(s[0]) for s in segs)
    keys: dict[str, int] = {}
    codes = []
    for s in segs:
        if not int(s[0]):
            continue
        lut = np.array([keys.setdefault(p, len(keys)) for p in s[2].split(SEP)], dtype="<i4")
        codes.append(lut[np.frombuffer(bytes(s[3]), dtype="<i4")])
    code_blob = np.concatenate(codes).astype("<i4").tobytes() if codes else b""
    params = None if segs[0][5] is None else b"".join(bytes(s[5]) for s in segs)
    cov = None if segs[0][6] is None else b"".join(bytes(s[6]) for s in segs)
    return (n, b"".join(bytes(s[1]) for s in segs), SEP.join(keys), code_blob,
            b"".join(bytes(s[4]) for s in segs), params, cov)


def _merge(conn, model: str, names: str, loose: int) -> None:
    run = getattr(conn, "execute_binary", conn.execute)
    segs = run(f"SELECT {_COLUMNS} FROM curve_pack WHERE model = ? AND param_names = ? AND loose = ? ORDER BY id",
               (model, names, loose)).fetchall()
    conn.execute("DELETE FROM curve_pack WHERE model = ? AND param_names = ? AND loose = ?", (model, names, loose))
    conn.execute(_INSERT, (model, names, loose, *_join(segs)))


def rebuild(conn) -> None:
    """Pack every curve row again (after a removal, or when migrating an older library)."""
    conn.execute("DELETE FROM curve_pack")
    rows = conn.execute("SELECT id, part_id, model, param_names, numbers_f64, params_f64, covariance_f64 "
                        "FROM curve ORDER BY id").fetchall()
    keys = ("id", "part_id", "model", "param_names", "numbers_f64", "params_f64", "covariance_f64")
    items = [dict(zip(keys, r)) for r in rows]
    groups: dict[tuple, list[dict]] = defaultdict(list)
    for it in items:
        groups[(it["model"], it["param_names"], it["params_f64"] is None)].append(it)
    for group in groups.values():  # one segment per variant, whatever MAX_SEGMENTS is
        append(conn, group)


def _extend_numbers(conn, old_count: int, extra) -> None:
    """Append to every curve's query numbers that has old_count of them the values
    extra(document) gives (read from the curve's document; a document it cannot read gives
    extra(None)), then pack again: how a migration brings a new query number in."""
    rows = conn.execute("SELECT c.id, c.numbers_f64, d.document FROM curve c "
                        "JOIN curve_doc d ON d.curve_id = c.id ORDER BY c.id").fetchall()
    for cid, numbers, document in rows:
        numbers = bytes(numbers)
        if len(numbers) != 8 * old_count:
            continue
        try:
            values = extra(json.loads(document))
        except (ValueError, TypeError, AttributeError):
            values = extra(None)
        conn.execute("UPDATE curve SET numbers_f64 = ? WHERE id = ?",
                     (numbers + np.asarray(values, dtype="<f8").tobytes(), cid))
    rebuild(conn)


def migrate_v3(conn, create_statements: list[str]) -> None:
    """Schema version 3: model_error_F joins each curve's query numbers (read from its
    document), and the pack takes its present layout (part codes, covariance triangle)."""
    conn.execute("DROP TABLE curve_pack")
    for statement in create_statements:
        conn.execute(statement)
    _extend_numbers(conn, N_NUMBERS_V2,
                    lambda doc: [float((doc or {}).get("model_error_F") or 0.0)])


def migrate_v4(conn) -> None:
    """Schema version 4: the model-choice term joins each curve's query numbers (read from
    its document; zeros for curves fitted before it existed), and the pack is rebuilt."""
    _extend_numbers(conn, N_NUMBERS_V3, lambda doc: choice_numbers((doc or {}).get("model_choice_u_F")))


def load(conn) -> list[Segment]:
    """Every segment, those of one variant joined (inside the caller's read snapshot)."""
    by_key: dict[tuple, list] = defaultdict(list)
    run = getattr(conn, "execute_binary", conn.execute)  # PostgreSQL: blobs as bytes, not hex text
    for row in run(f"SELECT model, param_names, loose, {_COLUMNS} FROM curve_pack ORDER BY id").fetchall():
        by_key[(row[0], row[1], int(row[2]))].append(row[3:])
    out = []
    for (model, names, loose), segs in sorted(by_key.items()):
        pnames = tuple(json.loads(names))
        k = len(pnames)
        n, ids, keys, codes, numbers, params, cov = segs[0] if len(segs) == 1 else _join(segs)
        n = int(n)
        if n == 0:
            continue
        seg = Segment(model, pnames, bool(loose), np.frombuffer(bytes(ids), dtype="<i8"), keys.split(SEP),
                      np.frombuffer(bytes(codes), dtype="<i4"),
                      np.frombuffer(bytes(numbers), dtype="<f8").reshape(n, N_NUMBERS), None, None)
        if not loose:
            seg.params = np.frombuffer(bytes(params), dtype="<f8").reshape(n, k)
            seg.covariance = np.frombuffer(bytes(cov), dtype="<f8").reshape(n, k * (k + 1) // 2)
        if seg.ids.size != n or seg.part_codes.size != n:  # pragma: no cover - a damaged library
            from benchkit.errors import UserError

            raise UserError("library pack: row count mismatch while loading; the library may be damaged")
        out.append(seg)
    return out
