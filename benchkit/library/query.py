"""Parts ranked by effective capacitance at a DC bias and a temperature, over the whole library.

The rules (also in `benchkit library query --help`):

- Effective capacitance is the differential capacitance C(V) = dQ/dV of the stored curves, what
  an LCR meter reads under bias [published: Costinett, Maksimovic, Zane, IEEE Trans. Power
  Electron. 30(2), 985 (2015), for which capacitance is which].
- Never extrapolated: a curve answers only inside its valid range (the bias it was measured
  over). A part none of whose curves reaches the bias is listed as NOT COVERED with the range
  it has.
- Temperature: curves measured within +-temp_tol_C (default 2 degC) of the asked temperature
  answer for it. Without such curves, the nearest curves below and above the asked
  temperature (each within their own +-temp_tol_C cluster) are evaluated and C is
  interpolated linearly in temperature between them. A temperature outside what a part's
  curves span is NOT COVERED: no extrapolation in temperature either.
- Several curves of one part at one temperature (samples, sweep branches) are pooled: C is
  their mean; u combines the mean fit variance and the spread between the curves,
  u = sqrt(mean(u_i^2) + s^2), i.e. the uncertainty of what one part of that number gives.
  Interpolated values carry u = sqrt(((1-w)*u_lo)^2 + (w*u_hi)^2).
- Origins are not mixed: a part is answered from its lot summaries if they cover the query,
  else from its measured curves, else from supplier claims; the answer names the origin.
- Ranking: covered parts by C_F, largest first; then the parts not covered, by part id.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from benchkit.errors import UserError
from benchkit.library import schema
from benchkit.library.records import QueryResult
from benchkit.library.table import CurveTable, branch_code, load_table

DEFAULT_TEMP_TOL_C = 2.0


def table_for(lib) -> CurveTable:
    """The cached arrays of `lib`, rebuilt if any process changed the file since."""
    gen = lib.generation
    if lib._table is None or lib._table.generation != gen:
        with lib._db.read() as conn:
            gen = int(conn.execute("SELECT value FROM meta WHERE key = 'generation'").fetchone()[0])
            lib._table = load_table(conn, gen)
    return lib._table


@dataclass
class _Pool:
    n: np.ndarray
    C: np.ndarray
    u: np.ndarray
    temp: np.ndarray


def _pool(key: np.ndarray, mask: np.ndarray, C, u, temp, K: int) -> _Pool:
    """Mean C, pooled u and mean temperature per key over the curves in mask (bincount, no loops)."""
    k = key[mask]
    c = C[mask]
    uu = u[mask]
    n = np.bincount(k, minlength=K)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(k, c, minlength=K) / n
        dev = c - mean[k]
        ss = np.bincount(k, dev * dev, minlength=K)
        spread = np.where(n > 1, ss / np.maximum(n - 1, 1), 0.0)
        mu2 = np.bincount(k, uu * uu, minlength=K) / n
        up = np.sqrt(mu2 + spread)
        tmean = np.bincount(k, temp[mask], minlength=K) / n
    return _Pool(n, mean, up, tmean)


def _group_extreme(key, mask, values, K, fn, fill):
    out = np.full(K, fill)
    fn.at(out, key[mask], values[mask])
    return out


def run_query(lib, bias_V: float, temp_C: float = 25.0, *, min_C_F: float | None = None,
              case: str | None = None, class_code: str | None = None, branch: str | None = None,
              origin: str | None = None, temp_tol_C: float = DEFAULT_TEMP_TOL_C,
              limit: int | None = None, min_rated_V: float | None = None,
              nominal_C_F: float | None = None) -> list[QueryResult]:
    """See the module docstring for the rules. Returns QueryResult objects, ranked."""
    V = float(bias_V)
    T = float(temp_C)
    tol = float(temp_tol_C)
    if not (np.isfinite(V) and np.isfinite(T) and np.isfinite(tol) and tol >= 0):
        raise UserError(f"query: bias {bias_V!r}, temperature {temp_C!r} and tolerance {temp_tol_C!r} "
                        f"must be finite numbers")
    if origin is not None and origin not in schema.ORIGINS:
        raise UserError(f"query: origin {origin!r} is not one of {', '.join(schema.ORIGINS)}")
    if branch is not None and branch not in ("rising", "falling"):
        raise UserError(f"query: branch {branch!r} must be 'rising' or 'falling'")
    t = table_for(lib)
    P = len(t.parts)
    R = len(schema.ORIGINS)
    K = P * R

    part_ok = np.ones(P, dtype=bool)
    if case is not None:
        part_ok &= t.part_case == case
    if class_code is not None:
        part_ok &= t.part_class == class_code
    if min_rated_V is not None:  # rated at least this voltage (parts without a rating drop out)
        rated = np.array([p.rated_V if p.rated_V is not None else np.nan for p in t.parts], dtype=float)
        part_ok &= np.nan_to_num(rated, nan=-np.inf) >= float(min_rated_V)
    if nominal_C_F is not None:  # this nominal value (within 0.5 %: E-series steps are far wider)
        nominal = np.array([p.nominal_C_F if p.nominal_C_F is not None else np.nan for p in t.parts], dtype=float)
        part_ok &= np.abs(np.nan_to_num(nominal, nan=np.inf) / float(nominal_C_F) - 1.0) <= 0.005
    ok = part_ok[t.part_index] if t.n else np.zeros(0, dtype=bool)
    if branch is not None:
        ok &= t.branch == branch_code(branch)
    if origin is not None:
        ok &= t.origin_rank == schema.ORIGINS.index(origin)
    key = t.part_index * R + t.origin_rank
    dT = t.temp_C - T
    # which curves can answer: at the asked temperature, or the nearest below and above it
    at = ok & (np.abs(dT) <= tol)
    below = ok & (dT < -tol)
    above = ok & (dT > tol)
    T_lo = _group_extreme(key, below, t.temp_C, K, np.maximum, -np.inf)
    T_hi = _group_extreme(key, above, t.temp_C, K, np.minimum, np.inf)
    near_lo = below & (np.abs(t.temp_C - T_lo[key]) <= tol)
    near_hi = above & (np.abs(t.temp_C - T_hi[key]) <= tol)
    # never extrapolated; the edge tolerance is fits.Curve's own (1e-9 of the range's size)
    edge = 1e-9 * np.maximum(1.0, np.maximum(np.abs(t.lo_V), np.abs(t.hi_V)))
    inside = (t.lo_V - edge <= V) & (V <= t.hi_V + edge)
    n_at = np.bincount(key[at], minlength=K)
    # only the curves that may answer: those at the temperature, and the nearest below and
    # above it only for a part (and origin) with none at the temperature
    C, u = t.evaluate(V, (at | ((near_lo | near_hi) & (n_at[key] == 0))) & inside)
    reach = ok & inside & np.isfinite(C)

    # 1) curves at the asked temperature
    p_at = _pool(key, at & reach, C, u, t.temp_C, K)
    # 2) else the nearest temperatures below and above, interpolated
    p_lo = _pool(key, near_lo & reach, C, u, t.temp_C, K)
    p_hi = _pool(key, near_hi & reach, C, u, t.temp_C, K)
    bracket = (n_at == 0) & np.isfinite(T_lo) & np.isfinite(T_hi)
    with np.errstate(invalid="ignore", divide="ignore"):
        w = (T - p_lo.temp) / (p_hi.temp - p_lo.temp)
        C_br = (1.0 - w) * p_lo.C + w * p_hi.C
        u_br = np.hypot((1.0 - w) * p_lo.u, w * p_hi.u)
    covered_at = (n_at > 0) & (p_at.n > 0)
    covered_br = bracket & (p_lo.n > 0) & (p_hi.n > 0)
    covered = covered_at | covered_br
    C_key = np.where(covered_at, p_at.C, C_br)
    u_key = np.where(covered_at, p_at.u, u_br)
    present = np.bincount(key[ok], minlength=K) > 0

    # 3) per part: the first origin (lot summary, measured, supplier claim) that answers
    cov2 = covered.reshape(P, R)
    pres2 = present.reshape(P, R)
    r = np.where(cov2.any(axis=1), np.argmax(cov2, axis=1), np.argmax(pres2, axis=1))
    chosen = np.arange(P) * R + r
    used = np.where(covered_at[key], at & reach, (near_lo | near_hi) & reach & covered_br[key])
    used &= chosen[t.part_index] == key
    used_rows = np.nonzero(used)[0]
    used_rows = used_rows[np.argsort(key[used_rows], kind="stable")]
    used_keys = key[used_rows]

    # reasons, for the keys that do not answer (vectorised extremes, text built per part below)
    hi_at = _group_extreme(key, at, t.hi_V, K, np.maximum, -np.inf)
    lo_at = _group_extreme(key, at, t.lo_V, K, np.minimum, np.inf)
    t_min = _group_extreme(key, ok, t.temp_C, K, np.minimum, np.inf)
    t_max = _group_extreme(key, ok, t.temp_C, K, np.maximum, -np.inf)
    hi_lo = _group_extreme(key, near_lo, t.hi_V, K, np.maximum, -np.inf)
    hi_hi = _group_extreme(key, near_hi, t.hi_V, K, np.maximum, -np.inf)
    any_curve = np.bincount(t.part_index, minlength=P) > 0 if t.n else np.zeros(P, dtype=bool)

    # per part, as Python values in one go (tolist is far cheaper than element access)
    starts = np.searchsorted(used_keys, chosen).tolist()
    ends = np.searchsorted(used_keys, chosen + 1).tolist()
    used_ids = t.curve_id[used_rows].tolist()
    at_l = covered_at[chosen].tolist()
    C_l = C_key[chosen].tolist()
    u_l = u_key[chosen].tolist()
    t_at = p_at.temp[chosen].tolist()
    t_lo = p_lo.temp[chosen].tolist()
    t_hi = p_hi.temp[chosen].tolist()
    r_l = r.tolist()
    reason_arrays = {"present": present, "n_at": n_at, "bracket": bracket, "hi_at": hi_at, "lo_at": lo_at,
                     "t_min": t_min, "t_max": t_max, "T_lo": T_lo, "T_hi": T_hi, "hi_lo": hi_lo,
                     "hi_hi": hi_hi, "n_lo": p_lo.n, "n_hi": p_hi.n}
    candidates = np.nonzero(part_ok)[0]
    answers = covered[chosen[candidates]]
    good = candidates[answers]
    if min_C_F is not None:
        good = good[C_key[chosen[good]] >= min_C_F]
    # ranked by C, largest first; parts are in id order, so a stable sort breaks ties by id
    good = good[np.argsort(-C_key[chosen[good]], kind="stable")]
    parts = t.parts
    covered_parts = [
        QueryResult(parts[pi], True, C_l[pi], u_l[pi] if u_l[pi] == u_l[pi] else None, "",
                    schema.ORIGINS[r_l[pi]], ends[pi] - starts[pi], tuple(used_ids[starts[pi]:ends[pi]]),
                    (t_at[pi],) if at_l[pi] else (t_lo[pi], t_hi[pi]), lib.curve)
        for pi in good.tolist()]
    uncovered_parts = []
    for pi in candidates[~answers].tolist():  # already in part id order
        k = int(chosen[pi])
        info = {name: arr[k] for name, arr in reason_arrays.items()}
        uncovered_parts.append(QueryResult(
            parts[pi], False, None, None, _reason(V, T, tol, bool(any_curve[pi]), info),
            schema.ORIGINS[r_l[pi]] if info["present"] else None, 0, (), (), lib.curve))
    out = covered_parts + uncovered_parts
    return out[:limit] if limit is not None else out


def _reason(V: float, T: float, tol: float, any_curve: bool, info: dict) -> str:
    """Why a part does not answer, in one line (info: this part's entries of the query arrays)."""
    def deg(x) -> str:
        return f"{round(float(x), 1):g}"

    if not any_curve:
        return "no curve in the library"
    if not info["present"]:
        return "no curve matches the branch/origin asked"
    if info["n_at"] > 0:
        if V > info["hi_at"]:
            return f"valid range stops at {float(info['hi_at']):g} V (curves at {T:g} degC; no extrapolation)"
        if V < info["lo_at"]:
            return f"valid range starts at {float(info['lo_at']):g} V (curves at {T:g} degC; no extrapolation)"
        return f"no curve at {T:g} degC gives a value at {V:g} V"
    if info["bracket"]:
        for t_side, hi_side, n_side in (("T_lo", "hi_lo", "n_lo"), ("T_hi", "hi_hi", "n_hi")):
            if info[n_side] == 0:
                return (f"between {deg(info['T_lo'])} and {deg(info['T_hi'])} degC: the curves at "
                        f"{deg(info[t_side])} degC do not reach {V:g} V (they stop at "
                        f"{float(info[hi_side]):g} V; no extrapolation)")
        return "no value"  # pragma: no cover - covered keys do not come here
    return (f"temperature {T:g} degC is outside the curves held ({deg(info['t_min'])}..{deg(info['t_max'])} "
            f"degC, +-{tol:g} degC); no extrapolation in temperature")
