"""Every stored curve as stacked numpy arrays, grouped by model, for the vectorised query.

Why: design queries ask "what does each part give at 12 V, 85 degC" over the whole library.
One numpy call per model over stacked parameter arrays (fits models broadcast their
parameters) is hundreds of times faster than a Python loop over curve objects. The table is
cached on the Library object and rebuilt when the file's generation counter moves (any
process's commit moves it).
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

import numpy as np

from benchkit.errors import UserError
from benchkit.library import fitsbridge, pack
from benchkit.library.records import PartRecord

BRANCH_CODES = {None: 0, "": 0, "rising": 1, "falling": 2}


def branch_code(branch: str | None) -> int:
    return BRANCH_CODES.get(branch, 3)


@dataclass
class ModelGroup:
    """Curves of one model variant: rows into the table, parameters (n, k), the covariance's
    lower triangle (n, k(k+1)/2, pack.tril order), each curve's model-error term (n,), its
    valid range (n,) twice and its model-choice term at pack.CHOICE_NODES biases (n, m)."""

    model: str
    param_names: tuple[str, ...]
    spec: object
    rows: np.ndarray
    P: np.ndarray
    cov: np.ndarray
    model_error: np.ndarray
    lo_V: np.ndarray
    hi_V: np.ndarray
    choice: np.ndarray

    def evaluate(self, V: float, sel: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """C and its standard uncertainty for the group's curves at V (those where sel is True,
        when given), with the band fits.Curve.u_C gives: u_C^2 = J Sigma J^T + model_error_F^2
        + u_choice(V)^2, the last linear between the curve's equally spaced values.

        J = dC/dp by central differences over the whole stack at once; the step follows
        fits.models.base.ModelSpec.jacobian (1e-6 of the parameter, or of the typical size of
        its kind when it is 0), so the answer matches Curve.u_C to the differencing error.
        J Sigma J^T is summed over the stored triangle: diagonal terms once, the others twice.
        """
        names = self.param_names
        k = len(names)
        P_all = self.P if sel is None else self.P[sel]
        tri = self.cov if sel is None else self.cov[sel]
        err = self.model_error if sel is None else self.model_error[sel]
        choice = self.choice if sel is None else self.choice[sel]
        lo = self.lo_V if sel is None else self.lo_V[sel]
        hi = self.hi_V if sel is None else self.hi_V[sel]
        cols = {n: P_all[:, j] for j, n in enumerate(names)}
        nrow = P_all.shape[0]
        ti, tj = pack.tril(k)
        with np.errstate(all="ignore"):
            C = np.broadcast_to(np.asarray(self.spec.C(V, **cols), dtype=float), (nrow,))
            diag = tri[:, ti == tj]  # (n, k): the variances, in parameter order
            # parameters held fixed in every fit (variance 0, e.g. poly V_scale_V, table knots)
            # contribute nothing: skip their derivative (saves model calls).
            active = [j for j in range(k) if np.any(np.nan_to_num(diag[:, j]) != 0.0)]
            cap = [j for j, n in enumerate(names) if n.endswith("_F")]
            cap_size = np.max(np.abs(P_all[:, cap]), axis=1) if cap else np.ones(nrow)
            cap_size = np.maximum(cap_size, 1e-30)
            J = np.zeros((nrow, k))
            for j in active:
                n = names[j]
                p = P_all[:, j]
                typical = cap_size if n.endswith("_F") else 1.0
                h = 1e-6 * np.where(p != 0.0, np.abs(p), typical)
                up = dict(cols)
                up[n] = p + h
                dn = dict(cols)
                dn[n] = p - h
                J[:, j] = (np.asarray(self.spec.C(V, **up)) - np.asarray(self.spec.C(V, **dn))) / (2.0 * h)
            on = set(active)
            use = np.array([a in on and b in on for a, b in zip(ti.tolist(), tj.tolist())], dtype=bool)
            weight = np.where(ti == tj, 1.0, 2.0)[use]
            var = np.einsum("np,np,p->n", J[:, ti[use]] * J[:, tj[use]], tri[:, use], weight)
            m = choice.shape[1]
            pos = np.clip((V - lo) / (hi - lo) * (m - 1), 0.0, m - 1)
            j = np.minimum(pos.astype(np.int64), m - 2)
            f = pos - j
            at = np.arange(nrow)
            u_choice = (1.0 - f) * choice[at, j] + f * choice[at, j + 1]
            u = np.sqrt(np.clip(var + err * err + u_choice * u_choice, 0.0, None))
            u[np.any(np.isnan(tri), axis=1)] = np.nan  # no covariance stored
        return C, u


@dataclass
class CurveTable:
    generation: int
    parts: list[PartRecord]
    part_case: np.ndarray
    part_class: np.ndarray
    curve_id: np.ndarray
    part_index: np.ndarray
    origin_rank: np.ndarray
    branch: np.ndarray
    temp_C: np.ndarray
    lo_V: np.ndarray
    hi_V: np.ndarray
    groups: list[ModelGroup]
    loose: list[tuple[int, str]] = field(default_factory=list)  # (row, document): evaluated one by one
    _loose_curves: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.curve_id.size)

    def evaluate(self, V: float, need: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """C_F and u_C_F of every curve at V, or of the rows where `need` is True (NaN where a
        curve cannot say or was not asked: outside its range, unknown model)."""
        C = np.full(self.n, np.nan)
        u = np.full(self.n, np.nan)
        for g in self.groups:
            if need is None:
                c, uu = g.evaluate(V)
                C[g.rows] = c
                u[g.rows] = uu
                continue
            sel = need[g.rows]
            if not sel.any():
                continue
            c, uu = g.evaluate(V, sel)
            C[g.rows[sel]] = c
            u[g.rows[sel]] = uu
        for row, doc in self.loose:
            if need is not None and not need[row]:
                continue
            if not (self.lo_V[row] <= V <= self.hi_V[row]):
                continue
            curve = self._loose_curves.get(row)
            if curve is None:
                try:
                    curve = fitsbridge.curve_from_json(doc, f"library curve {self.curve_id[row]}")
                except UserError:
                    continue
                self._loose_curves[row] = curve
            try:
                C[row] = float(curve.C(V))
                u[row] = float(curve.u_C(V))
            except fitsbridge.fits_errors():
                continue
        return C, u


def load_table(conn, generation: int) -> CurveTable:
    """Read parts and the packed curves (inside one read snapshot) into arrays (pack.py).

    Curves superseded by a newer record of the same curve (Library.revise_curve) are left out:
    the query answers from the latest record of each curve.
    """
    run = getattr(conn, "execute_binary", conn.execute)  # PostgreSQL: numbers as numbers, no text round trip
    parts = [PartRecord(*r) for r in run(
        "SELECT part_id, description, nominal_C_F, tolerance, rated_V, class_code, case_code, supplier "
        "FROM part ORDER BY part_id").fetchall()]
    parts.sort(key=lambda p: p.part_id)  # code-point order, whatever the server's collation
    index = {p.part_id: i for i, p in enumerate(parts)}
    retired = {int(r[0]) for r in conn.execute(
        "SELECT c.id FROM revision r JOIN curve c ON c.content_sha256 = r.old_sha256")}
    chunks: dict[str, list[np.ndarray]] = {k: [] for k in
                                           ("id", "part", "origin", "branch", "temp", "lo", "hi")}
    groups: list[ModelGroup] = []
    loose_rows: list[tuple[int, int]] = []  # (row, curve id)
    start = 0
    for seg in pack.load(conn):
        keep = slice(None)  # all of them: views, no copies
        if retired:
            keep = ~np.isin(seg.ids, np.fromiter(retired, dtype=np.int64))
        ids = seg.ids[keep]
        n = int(ids.size)
        if n == 0:
            continue
        numbers = seg.numbers[keep]
        lut = np.fromiter((index[p] for p in seg.part_keys), dtype=np.int64, count=len(seg.part_keys))
        chunks["id"].append(ids)
        chunks["part"].append(lut[seg.part_codes[keep]])  # codes -> part numbers, one numpy take
        chunks["lo"].append(numbers[:, 0])
        chunks["hi"].append(numbers[:, 1])
        chunks["temp"].append(numbers[:, 2])
        chunks["origin"].append(numbers[:, 3].astype(np.int64))
        chunks["branch"].append(numbers[:, 4].astype(np.int64))
        rows = np.arange(start, start + n, dtype=np.int64)
        start += n
        if seg.loose:
            loose_rows.extend(zip(rows.tolist(), ids.tolist()))
            continue
        try:
            spec = fitsbridge.model_spec(seg.model, seg.param_names)
        except UserError:
            continue  # a model this benchkit does not know: its curves stay NaN (not covered)
        groups.append(ModelGroup(seg.model, seg.param_names, spec, rows, seg.params[keep], seg.covariance[keep],
                                 numbers[:, pack.MODEL_ERROR], numbers[:, 0], numbers[:, 1],
                                 numbers[:, pack.CHOICE]))
    # curves whose parameters are not plain numbers: evaluated one by one through fits.Curve
    loose = []
    if loose_rows:
        loose = [(row, conn.execute("SELECT document FROM curve_doc WHERE curve_id = ?", (cid,)).fetchone()[0])
                 for row, cid in loose_rows]

    def cat(key, dtype):
        return np.concatenate(chunks[key]).astype(dtype) if chunks[key] else np.zeros(0, dtype=dtype)

    part_case = np.array([p.case or "" for p in parts], dtype=object)
    part_class = np.array([p.class_code or "" for p in parts], dtype=object)
    return CurveTable(generation, parts, part_case, part_class, cat("id", np.int64), cat("part", np.int64),
                      cat("origin", np.int64), cat("branch", np.int64), cat("temp", float), cat("lo", float),
                      cat("hi", float), groups, loose)
