"""A curve as a CSV table: bias_V, C_F, delta_C_pct, u_C_F, at biases inside its valid range only.

A block of '# key = value' lines comes first (part, sample, conditions, source, units), so the
table describes itself once it has left the library; then one column row and the values, floats
at full precision (repr), so the table reproduces the curve to the last digit. Readers skip
the block as comments (csv readers with comment='#', spreadsheets show it as text rows).
"""

from __future__ import annotations

import csv
import io

import numpy as np

from benchkit.errors import UserError

COLUMNS = ("bias_V", "C_F", "delta_C_pct", "u_C_F")
DEFAULT_POINTS = 51
TABLE_FORMAT = "benchkit-curve-table"
UNITS = ("bias_V in V; C_F in F; delta_C_pct in % of C at 0 V (or the lowest bias measured); "
         "u_C_F in F, standard uncertainty (k = 1) from the fit")


def header_lines(curve, source_note: str | None = None) -> list[str]:
    """The '# key = value' block: what was measured, how, and where the numbers come from."""
    def clean(v) -> str:
        return " ".join(str(v).split())

    items = [("format", TABLE_FORMAT)]
    for key in ("part_id", "sample_id", "branch", "origin", "model"):
        v = getattr(curve, key, None)
        if v not in (None, ""):
            items.append((key, v))
    conds = dict(getattr(curve, "conditions", None) or {})
    for key in ("freq_Hz", "ac_level_Vrms", "temp_C", "function", "age_h"):
        v = conds.get(key)
        if v is not None:
            items.append((key, f"{v:.6g}" if isinstance(v, float) else v))
    lo, hi = (float(x) for x in curve.valid_range_V)
    items.append(("valid_range_V", f"{lo:g}..{hi:g}"))
    src = dict(getattr(curve, "source", None) or {})
    parts = [f"{k} {src[k]}" for k in ("run_id", "points_sha256") if src.get(k)]
    if source_note:
        parts.append(source_note)
    if parts:
        items.append(("source", "; ".join(parts)))
    items.append(("units", UNITS))
    return [f"# {k} = {clean(v)}" for k, v in items]


def bias_grid(curve, n_points: int = DEFAULT_POINTS) -> np.ndarray:
    """n evenly spaced biases from the low to the high end of the valid range (ends included)."""
    if int(n_points) < 2:
        raise UserError(f"--points {n_points}: a table needs at least 2 points")
    lo, hi = (float(x) for x in curve.valid_range_V)
    return np.linspace(lo, hi, int(n_points))


def _each(fn, V: np.ndarray) -> np.ndarray:
    try:
        out = np.asarray(fn(V), dtype=float)
        if out.shape == V.shape:
            return out
    except (TypeError, ValueError):
        pass
    return np.array([float(fn(float(v))) for v in V])


def curve_csv(curve, bias_V=None, n_points: int = DEFAULT_POINTS, source_note: str | None = None) -> str:
    """The table text. `bias_V` (inside the valid range) overrides the even grid."""
    V = bias_grid(curve, n_points) if bias_V is None else np.asarray(bias_V, dtype=float).ravel()
    lo, hi = (float(x) for x in curve.valid_range_V)
    other = V[curve.unmeasured_polarity(V)] if hasattr(curve, "unmeasured_polarity") else V[:0]
    if other.size:
        raise UserError(f"bias {other[0]:g} V: the curve was measured at {curve.measured_polarity} "
                        f"bias only ({lo:g}..{hi:g} V); a table of the other polarity is refused")
    outside = V[(V < lo) | (V > hi)]
    if outside.size:
        raise UserError(f"bias {outside[0]:g} V is outside the curve's valid range {lo:g}..{hi:g} V; "
                        f"tables are never extrapolated")
    C = _each(curve.C, V)
    dC = _each(curve.delta_pct, V)
    u = _each(curve.u_C, V)
    buf = io.StringIO()
    buf.write("\n".join(header_lines(curve, source_note)) + "\n")
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(COLUMNS)
    for row in zip(V, C, dC, u):
        w.writerow([repr(float(x)) if np.isfinite(x) else "" for x in row])
    return buf.getvalue()


def read_curve_csv(text: str) -> dict[str, np.ndarray]:
    """Columns of a table written by curve_csv (for round-trip checks and downstream scripts)."""
    rows = list(csv.reader(line for line in io.StringIO(text) if not line.startswith("#")))
    if not rows or tuple(rows[0]) != COLUMNS:
        raise UserError(f"not a benchkit curve table: header must be {','.join(COLUMNS)}")
    data = np.array([[float(x) if x else np.nan for x in r] for r in rows[1:]], dtype=float)
    return {name: data[:, j] for j, name in enumerate(COLUMNS)}
