"""The query's column store: the numbers of every curve packed in a few large blobs.

Why: a cold design query over 100,000 curves must not visit 100,000 rows. Every write
transaction that stores curves also appends one segment per model variant to `curve_pack`
(ids, part ids, the five query numbers, parameters, covariance as float64 arrays), in the same
transaction as the rows, so the pack is never out of step with them on either backend. A cold
load reads a handful of segments and hands numpy whole arrays. Segments of one variant are
merged into one once there are more than MAX_SEGMENTS of them; removing curves (rare: records
are otherwise immutable) rebuilds the pack from the rows.

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
N_NUMBERS = 5  # valid_lo_V, valid_hi_V, temp_C, origin rank, branch code (schema.py)

_INSERT = ("INSERT INTO curve_pack(model, param_names, loose, n, ids, part_ids, numbers, params, covariance) "
           "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)")


@dataclass
class Segment:
    """The packed curves of one model variant (or the loose curves), as numpy arrays."""

    model: str
    param_names: tuple[str, ...]
    loose: bool
    ids: np.ndarray          # (n,) int64
    part_ids: list[str]      # n part ids
    numbers: np.ndarray      # (n, 5)
    params: np.ndarray | None      # (n, k)
    covariance: np.ndarray | None  # (n, k, k), NaN where a curve has none

    @property
    def n(self) -> int:
        return int(self.ids.size)


def _blob(x) -> bytes:
    return bytes(x) if x is not None else b""


def _nan_cov(k: int) -> bytes:
    return np.full(k * k, np.nan).astype("<f8").tobytes()


def append(conn, rows: list[dict]) -> None:
    """Pack freshly inserted curve rows (dicts of id, part_id and the curve columns)."""
    groups: dict[tuple[str, str, int], list[dict]] = defaultdict(list)
    for r in rows:
        groups[(r["model"], r["param_names"], int(r["params_f64"] is None))].append(r)
    for (model, names, loose), items in sorted(groups.items()):
        k = len(json.loads(names))
        ids = np.array([r["id"] for r in items], dtype="<i8").tobytes()
        pids = SEP.join(r["part_id"] for r in items)
        numbers = b"".join(_blob(r["numbers_f64"]) for r in items)
        if loose:
            params = cov = None
        else:
            params = b"".join(_blob(r["params_f64"]) for r in items)
            cov = b"".join(_blob(r["covariance_f64"]) if r["covariance_f64"] is not None else _nan_cov(k)
                           for r in items)
        conn.execute(_INSERT, (model, names, loose, len(items), ids, pids, numbers, params, cov))
        n_seg = conn.execute("SELECT COUNT(*) FROM curve_pack WHERE model = ? AND param_names = ? AND loose = ?",
                             (model, names, loose)).fetchone()[0]
        if n_seg > MAX_SEGMENTS:
            _merge(conn, model, names, loose)


def _merge(conn, model: str, names: str, loose: int) -> None:
    segs = conn.execute("SELECT id, n, ids, part_ids, numbers, params, covariance FROM curve_pack "
                        "WHERE model = ? AND param_names = ? AND loose = ? ORDER BY id",
                        (model, names, loose)).fetchall()
    n = sum(int(s[1]) for s in segs)
    ids = b"".join(bytes(s[2]) for s in segs)
    pids = SEP.join(s[3] for s in segs)
    numbers = b"".join(bytes(s[4]) for s in segs)
    params = None if loose else b"".join(bytes(s[5]) for s in segs)
    cov = None if loose else b"".join(bytes(s[6]) for s in segs)
    conn.execute("DELETE FROM curve_pack WHERE model = ? AND param_names = ? AND loose = ?", (model, names, loose))
    conn.execute(_INSERT, (model, names, loose, n, ids, pids, numbers, params, cov))


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


def load(conn) -> list[Segment]:
    """Every segment, those of one variant joined (inside the caller's read snapshot)."""
    by_key: dict[tuple, list] = defaultdict(list)
    run = getattr(conn, "execute_binary", conn.execute)  # PostgreSQL: blobs as bytes, not hex text
    for row in run("SELECT model, param_names, loose, n, ids, part_ids, numbers, params, covariance "
                   "FROM curve_pack ORDER BY id").fetchall():
        by_key[(row[0], row[1], int(row[2]))].append(row[3:])
    out = []
    for (model, names, loose), segs in sorted(by_key.items()):
        pnames = tuple(json.loads(names))
        k = len(pnames)
        n = sum(int(s[0]) for s in segs)
        if n == 0:
            continue
        ids = np.frombuffer(b"".join(bytes(s[1]) for s in segs), dtype="<i8").astype(np.int64)
        pids: list[str] = []
        for s in segs:
            if int(s[0]):
                pids.extend(s[2].split(SEP))
        numbers = np.frombuffer(b"".join(bytes(s[3]) for s in segs), dtype="<f8").reshape(n, N_NUMBERS)
        params = cov = None
        if not loose:
            params = np.frombuffer(b"".join(bytes(s[4]) for s in segs), dtype="<f8").reshape(n, k)
            cov = np.frombuffer(b"".join(bytes(s[5]) for s in segs), dtype="<f8").reshape(n, k, k)
        if len(pids) != n or ids.size != n:  # pragma: no cover - a damaged library
            from benchkit.errors import UserError

            raise UserError("library pack: row count mismatch while loading; the library may be damaged")
        out.append(Segment(model, pnames, bool(loose), ids, pids, numbers, params, cov))
    return out
