"""The measured side of a verification: samples from run directories (fitted here with the
fits API) or from curve documents, with what the uncertainty budget needs of each.

A run directory holds several samples, maybe of several parts; only those of the claimed
part are used, the others are listed as skipped so the report says what was left out.
"""

from __future__ import annotations

import csv
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from benchkit.errors import UserError

RUN_COLUMNS = (
    "run_id", "sample_id", "part_id", "channel", "step_index", "branch", "repeat",
    "bias_set_V", "bias_meas_V", "bias_current_A", "function", "freq_Hz",
    "ac_level_set_Vrms", "ac_level_dut_Vrms", "C_F", "C_std_F", "D", "Rs_ohm", "n_readings",
    "temp_C", "t_s", "dwell_s", "settle_s", "drift_pct_per_s", "flags", "utc",
)  # CONTRACTS.md section 5
_NUMERIC = ("bias_set_V", "C_F", "C_std_F", "n_readings", "freq_Hz", "ac_level_dut_Vrms",
            "ac_level_set_Vrms", "temp_C")
# rows left out of the fit: the meter marked its readings unusable, or the part did not see
# the set bias (benchkit.runlog.FLAGS)
_DROP_FLAGS = ("overload", "current_limit", "bias_readback")
BIAS_GROUP_TOL_V = 1e-6
AGE_KEYS = ("age_h", "hours_since_heat_h")


@dataclass
class Points:
    """The points of one sample and branch, as used by the fit (flagged overloads dropped)."""

    bias_V: np.ndarray
    C_F: np.ndarray
    C_std_F: np.ndarray
    n_readings: np.ndarray

    def repeat_u_F(self, V: float) -> tuple[float, str]:
        """Repeatability at the measured bias nearest V: s/sqrt(n) between repeats when the
        bias was measured more than once, else the type-A u of that point's mean reading."""
        from benchkit.verify.uncertainty import type_a, type_a_from_std

        if self.bias_V.size == 0:
            return 0.0, "no points"
        i = int(np.argmin(np.abs(self.bias_V - V)))
        group = np.abs(self.bias_V - self.bias_V[i]) <= BIAS_GROUP_TOL_V
        if np.count_nonzero(group) >= 2:
            return type_a(self.C_F[group]), f"{np.count_nonzero(group)} repeats at {self.bias_V[i]:g} V"
        s, n = self.C_std_F[i], self.n_readings[i]
        if math.isfinite(s) and math.isfinite(n) and n >= 1:
            return type_a_from_std(s, int(n)), f"{int(n)} readings at {self.bias_V[i]:g} V"
        return 0.0, "no repeat data"


@dataclass
class MeasuredSample:
    """One sample of the claimed part, with its curve and conditions."""

    sample_id: str
    part_id: str
    origin: str  # "run <dir>" or "curve <file>"
    curve: object  # fits.Curve
    conditions: dict = field(default_factory=dict)  # freq_Hz, ac_level_Vrms, temp_C, age_h
    points: Points | None = None
    part: dict = field(default_factory=dict)
    run_id: str | None = None
    branch: str | None = None
    fit_report: str = ""

    def residual_u_F(self) -> float:
        """Standard deviation of the points about the fitted curve (noise plus lack of fit)."""
        stats = getattr(self.curve, "stats", None) or {}
        rms = stats.get("rms_pct_C0")
        if rms is None or not math.isfinite(float(rms)):
            return 0.0
        lo, hi = self.curve.valid_range_V
        ref = 0.0 if lo <= 0.0 <= hi else (lo if abs(lo) < abs(hi) else hi)
        return float(rms) / 100.0 * abs(float(self.curve.C(ref)))


@dataclass(frozen=True)
class Skipped:
    sample_id: str
    part_id: str
    origin: str
    reason: str


def _fits():
    """fit_sweep and Curve as CONTRACTS.md section 7 names them (from fits)."""
    import fits
    from fits import FitsError

    return fits, FitsError


def load_inputs(paths, part_id: str, branch: str = "rising", model: str = "auto",
                measured_age_h: float | None = None):
    """Read every RUN_DIR or CURVE.json; return (samples of part_id, skipped)."""
    samples: list[MeasuredSample] = []
    skipped: list[Skipped] = []
    if not paths:
        raise UserError("no measurement given: name at least one run directory or curve document")
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            got, skip = _from_run(p, part_id, branch, model)
        elif p.is_file():
            got, skip = _from_curve(p, part_id)
        else:
            raise UserError(f"{p}: no such run directory or curve document; check the path")
        samples.extend(got)
        skipped.extend(skip)
    if measured_age_h is not None:
        for s in samples:
            s.conditions["age_h"] = float(measured_age_h)
            s.conditions["age_source"] = "given on the command line"
    seen = {}
    for s in samples:
        key = s.sample_id
        if key in seen:
            raise UserError(f"sample {key} appears twice ({seen[key]} and {s.origin}); "
                            f"give each sample once")
        seen[key] = s.origin
    if not samples:
        found = sorted({f"{k.part_id}" for k in skipped})
        raise UserError(f"no sample of part {part_id} in the inputs"
                        + (f" (found parts: {', '.join(found)})" if found else "")
                        + "; check the claim's part_id or give --part")
    return samples, skipped


def _read_run_json(run_dir: Path) -> dict:
    f = run_dir / "run.json"
    try:
        meta = json.loads(f.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise UserError(f"{run_dir}: no run.json; not a run directory") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise UserError(f"{f}: not readable as JSON ({exc}); the run directory is damaged") from None
    if not isinstance(meta, dict) or meta.get("format") != "benchkit-run":
        raise UserError(f"{f}: field 'format' is not 'benchkit-run'; not a run directory")
    if meta.get("version") != 1:
        raise UserError(f"{f}: field 'version' {meta.get('version')!r} not supported (expected 1)")
    return meta


def _read_points(run_dir: Path, meta: dict) -> list[dict]:
    f = run_dir / str(meta.get("points_file") or "points.csv")
    try:
        text = f.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise UserError(f"{f}: points file missing; the run directory is incomplete") from None
    lines = text.splitlines()
    if not lines:
        raise UserError(f"{f}: empty; the run recorded no points")
    reader = csv.reader(lines)
    header = next(reader)
    if tuple(header) != RUN_COLUMNS:
        raise UserError(f"{f}:1: columns differ from the run format (CONTRACTS section 5)")
    rows = []
    for lineno, cells in enumerate(reader, start=2):
        if not cells:
            continue
        if len(cells) != len(RUN_COLUMNS):
            if lineno == len(lines) and meta.get("status") != "complete":
                break  # a point in progress when the run stopped: dropped, as the log allows
            raise UserError(f"{f}:{lineno}: {len(cells)} fields, expected {len(RUN_COLUMNS)}")
        row = dict(zip(RUN_COLUMNS, cells))
        for k in _NUMERIC:
            v = row[k]
            try:
                row[k] = float(v) if v != "" else math.nan
            except ValueError:
                raise UserError(f"{f}:{lineno}: field {k!r} = {v!r} is not a number") from None
        row["_line"] = lineno
        rows.append(row)
    return rows


def _sample_meta(meta: dict, sample_id: str) -> dict:
    for s in meta.get("samples") or []:
        if isinstance(s, dict) and s.get("sample_id") == sample_id:
            return s
    return {}


def _age_from(*dicts) -> float | None:
    for d in dicts:
        for k in AGE_KEYS:
            v = (d or {}).get(k)
            if isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v) and v > 0:
                return float(v)
    return None


def _mean(values) -> float | None:
    a = np.asarray([v for v in values if math.isfinite(v)], dtype=float)
    return float(a.mean()) if a.size else None


def _from_run(run_dir: Path, part_id: str, branch: str, model: str):
    fits, FitsError = _fits()
    meta = _read_run_json(run_dir)
    rows = _read_points(run_dir, meta)
    by_sample: dict[str, list[dict]] = {}
    for r in rows:
        by_sample.setdefault(r["sample_id"], []).append(r)
    samples, skipped = [], []
    origin = f"run {run_dir}"
    for sid, srows in by_sample.items():
        pid = srows[0]["part_id"]
        if pid != part_id:
            skipped.append(Skipped(sid, pid, origin, f"part {pid}, not the claimed {part_id}"))
            continue
        use = [r for r in srows if r["branch"] == branch] or srows
        used_branch = branch if any(r["branch"] == branch for r in srows) else use[0]["branch"]
        n_branch = len(use)
        use = [r for r in use if math.isfinite(r["C_F"]) and math.isfinite(r["bias_set_V"])
               and not any(w in r["flags"].split(";") for w in _DROP_FLAGS)]
        dropped = n_branch - len(use)
        if len(use) < 2:
            raise UserError(f"{run_dir}: sample {sid}: only {len(use)} usable point(s) on the "
                            f"{used_branch} branch; re-measure it or leave this run out")
        pts = Points(np.array([r["bias_set_V"] for r in use]), np.array([r["C_F"] for r in use]),
                     np.array([r["C_std_F"] for r in use]), np.array([r["n_readings"] for r in use]))
        sigma = None
        with np.errstate(invalid="ignore", divide="ignore"):
            cand = pts.C_std_F / np.sqrt(pts.n_readings)
        if cand.size and np.all(np.isfinite(cand)) and np.all(cand > 0):
            sigma = cand
        smeta = _sample_meta(meta, sid)
        sconds = smeta.get("conditions") or {}
        conds = {
            "freq_Hz": _mean(r["freq_Hz"] for r in use) or sconds.get("freq_Hz")
            or (meta.get("conditions") or {}).get("freq_Hz"),
            "ac_level_Vrms": _mean(r["ac_level_dut_Vrms"] for r in use),
            "ac_level_set_Vrms": _mean(r["ac_level_set_Vrms"] for r in use)
            or sconds.get("ac_level_Vrms"),
            "temp_C": _mean(r["temp_C"] for r in use),
            "age_h": _age_from(smeta, meta.get("conditions")),
            "function": (use[0]["function"] if use else None) or sconds.get("function"),
        }
        if conds["ac_level_Vrms"] is None:
            conds["ac_level_Vrms"] = conds["ac_level_set_Vrms"]
            conds["ac_level_source"] = "set level (no level across the part recorded)"
        else:
            conds["ac_level_source"] = "level across the part (mean of the points)"
        conds["age_source"] = "run.json" if conds["age_h"] is not None else "not recorded"
        conds["points_dropped"] = dropped
        conds["temp_change_points"] = sum("temp_change" in r["flags"].split(";") for r in use)
        curve_conds = {k: conds[k] for k in ("freq_Hz", "ac_level_Vrms", "temp_C", "function")}
        if conds["age_h"] is not None:
            curve_conds["age_h"] = conds["age_h"]
        source = {"points_sha256": meta.get("points_sha256"), "run_id": meta.get("run_id"),
                  "sample_id": sid, "part_id": pid, "branch": used_branch}
        try:
            outcome = fits.fit_sweep(pts.bias_V, pts.C_F, sigma_F=sigma, model=model,
                                     branch=used_branch, conditions=curve_conds, source=source,
                                     part_id=pid, sample_id=sid)
        except FitsError as exc:
            raise UserError(f"{run_dir}: sample {sid}: {exc}") from None
        curve = outcome.curve
        samples.append(MeasuredSample(sid, pid, origin, curve, conds, pts,
                                      dict(smeta.get("part") or {}), meta.get("run_id"),
                                      used_branch, getattr(outcome, "report", "")))
    return samples, skipped


def _from_curve(path: Path, part_id: str):
    fits, FitsError = _fits()
    try:
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise UserError(f"{path}: cannot read ({exc}); give a run directory or a curve document") from None
    try:
        curve = fits.Curve.from_json(text)
    except (FitsError, ValueError, KeyError, TypeError) as exc:
        raise UserError(f"{path}: not a usable curve document ({exc})") from None
    src = getattr(curve, "source", None) or {}
    pid = getattr(curve, "part_id", None) or src.get("part_id") or "?"
    sid = getattr(curve, "sample_id", None) or src.get("sample_id") or path.stem
    origin = f"curve {path}"
    if getattr(curve, "origin", "measured") == "supplier claim":
        return [], [Skipped(sid, pid, origin, "a supplier claim, not a measurement")]
    if pid != part_id:
        return [], [Skipped(sid, pid, origin, f"part {pid}, not the claimed {part_id}")]
    c = dict(getattr(curve, "conditions", None) or {})
    conds = {"freq_Hz": c.get("freq_Hz"), "ac_level_Vrms": c.get("ac_level_Vrms"),
             "temp_C": c.get("temp_C"), "age_h": _age_from(c), "function": c.get("function"),
             "ac_level_source": "curve document", "age_source": "curve document"
             if _age_from(c) is not None else "not recorded"}
    return [MeasuredSample(sid, pid, origin, curve, conds, None, {}, src.get("run_id"),
                           src.get("branch"))], []
