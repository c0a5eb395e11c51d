"""A curve as a CSV table: bias_V, C_F, delta_C_pct, u_C_F, at biases inside its valid range only.

Plain CSV (one header row, no comment lines) so any spreadsheet or script reads it; floats at
full precision (repr), so the table reproduces the curve to the last digit.
"""

from __future__ import annotations

import csv
import io

import numpy as np

from benchkit.errors import UserError

COLUMNS = ("bias_V", "C_F", "delta_C_pct", "u_C_F")
DEFAULT_POINTS = 51


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


def curve_csv(curve, bias_V=None, n_points: int = DEFAULT_POINTS) -> str:
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
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(COLUMNS)
    for row in zip(V, C, dC, u):
        w.writerow([repr(float(x)) if np.isfinite(x) else "" for x in row])
    return buf.getvalue()


def read_curve_csv(text: str) -> dict[str, np.ndarray]:
    """Columns of a table written by curve_csv (for round-trip checks and downstream scripts)."""
    rows = list(csv.reader(io.StringIO(text)))
    if not rows or tuple(rows[0]) != COLUMNS:
        raise UserError(f"not a benchkit curve table: header must be {','.join(COLUMNS)}")
    data = np.array([[float(x) if x else np.nan for x in r] for r in rows[1:]], dtype=float)
    return {name: data[:, j] for j, name in enumerate(COLUMNS)}
