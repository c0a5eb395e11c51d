"""The measured side of a verification: samples from run directories (fitted here with the
fits API) or from curve documents, with what the uncertainty budget needs of each.

A run directory holds several samples, maybe of several parts; only those of the claimed
part are used, the others are listed as skipped so the report says what was left out. Runs are
read by benchkit.sweep.rundir, the reader `benchkit fit` and the library use: the same points are
left out (benchkit.sweep.rundir.LEFT_OUT_FLAGS), weighted and checked the same way.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from benchkit.sweep import rundir
from benchkit.errors import UserError

BIAS_GROUP_TOL_V = 1e-6
AGE_KEYS = ("age_h", "hours_since_heat_h")


@dataclass
class Points:
    """The points of one sample and branch, as used by the fit (flagged points left out)."""

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
    path: str | None = None  # the run directory or curve document it came from (report identity)

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
    """fit_sweep and Curve as DEVELOPERS.md, "File formats": curve document names them (from fits)."""
    import fits
    from fits import FitsError

    return fits, FitsError


def load_inputs(paths, part_id: str, branch: str = "rising", model: str = "auto",
                measured_age_h: float | None = None, temp_C: float | None = None):
    """Read every RUN_DIR or CURVE.json; return (samples of part_id, skipped)."""
    samples: list[MeasuredSample] = []
    skipped: list[Skipped] = []
    if not paths:
        raise UserError("no measurement given: name at least one run directory or curve document")
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            got, skip = _from_run(p, part_id, branch, model, temp_C)
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


def _finite(values) -> np.ndarray:
    return np.asarray([v for v in values if math.isfinite(v)], dtype=float)


def _mean(values) -> float | None:
    a = _finite(values)
    return float(a.mean()) if a.size else None


def _span(values) -> tuple[float | None, float | None]:
    """Lowest and highest finite value (the level across the part over a sweep)."""
    a = _finite(values)
    return (float(a.min()), float(a.max())) if a.size else (None, None)


def _at_temperature(smp, temp_C: float | None):
    """The sample's points at the claim's temperature, when the run measured several
    (benchkit/sweep/tempgroups.py); (points, None) or (None, why not)."""
    from benchkit.sweep.tempgroups import TEMP_GROUP_TOL_C, split_by_temperature

    groups = split_by_temperature(smp)
    if len(groups) == 1:
        return smp, None
    want = 25.0 if temp_C is None else float(temp_C)   # no stated temperature: the reference
    near = [(abs(t - want), g) for t, g in groups if abs(t - want) <= TEMP_GROUP_TOL_C]
    if not near:
        have = ", ".join(f"{t:.1f}" for t, _ in groups)
        return None, f"no points at {want:g} degC (measured at {have} degC)"
    return min(near, key=lambda x: x[0])[1], None


def _from_run(run_dir: Path, part_id: str, branch: str, model: str, temp_C: float | None = None):
    fits, FitsError = _fits()
    data = rundir.read_run_dir(run_dir, action="verified")
    meta = data.meta
    samples, skipped = [], []
    origin = f"run {run_dir}"
    for sid, smp in data.samples.items():
        pid = smp.part_id
        if pid != part_id:
            skipped.append(Skipped(sid, pid, origin, f"part {pid}, not the claimed {part_id}"))
            continue
        smp, why = _at_temperature(smp, temp_C)  # a claim at 85 degC meets the points at 85 degC
        if smp is None:
            skipped.append(Skipped(sid, pid, origin, why))
            continue
        present = smp.branches()
        used_branch = branch if branch in present else present[0]
        use = smp.select(used_branch)
        dropped = use.left_out
        if use.n_points < 2:
            raise UserError(f"{run_dir}: sample {sid}: only {use.n_points} usable point(s) on the "
                            f"{used_branch} branch; re-measure it or leave this run out")
        pts = Points(use.bias_V, use.C_F, use.C_std_F, use.n_readings)
        smeta = _sample_meta(meta, sid)
        sconds = smeta.get("conditions") or {}
        fitted = rundir.fit_conditions(meta, use.rows)
        conds = {
            "freq_Hz": fitted["freq_Hz"] or sconds.get("freq_Hz"),
            "ac_level_Vrms": _mean(rundir.column(use.rows, "ac_level_dut_Vrms")),
            "ac_level_set_Vrms": fitted["ac_level_Vrms"] or sconds.get("ac_level_Vrms"),
            "temp_C": fitted["temp_C"],
            "age_h": _age_from(smeta, meta.get("conditions")),
            "function": fitted["function"] or sconds.get("function"),
        }
        conds["ac_level_dut_min_Vrms"], conds["ac_level_dut_max_Vrms"] = _span(
            rundir.column(use.rows, "ac_level_dut_Vrms"))
        if conds["ac_level_Vrms"] is None:
            conds["ac_level_Vrms"] = conds["ac_level_set_Vrms"]
            conds["ac_level_source"] = "set level (no level across the part recorded)"
        else:
            conds["ac_level_source"] = "level across the part (mean of the points)"
        conds["age_source"] = "run.json" if conds["age_h"] is not None else "not recorded"
        conds["points_dropped"] = dropped
        conds["temp_change_points"] = sum("temp_change" in rundir.flags_of(r) for r in use.rows)
        curve_conds = {k: conds[k] for k in ("freq_Hz", "ac_level_Vrms", "temp_C", "function")}
        if conds["age_h"] is not None:
            curve_conds["age_h"] = conds["age_h"]
        source = {"points_sha256": data.points_sha256, "run_id": meta.get("run_id"),
                  "sample_id": sid, "part_id": pid, "branch": used_branch}
        try:
            outcome = fits.fit_sweep(pts.bias_V, pts.C_F, sigma_F=use.sigma_F, model=model,
                                     branch=used_branch, conditions=curve_conds, source=source,
                                     part_id=pid, sample_id=sid)
        except FitsError as exc:
            raise UserError(f"{run_dir}: sample {sid}: {exc}") from None
        curve = outcome.curve
        samples.append(MeasuredSample(sid, pid, origin, curve, conds, pts,
                                      dict(smeta.get("part") or {}), meta.get("run_id"),
                                      used_branch, getattr(outcome, "report", ""), str(run_dir)))
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
                           src.get("branch"), path=str(path))], []
