"""From a run directory to stored curves: read points.csv, fit each sample's branches, store all at once.

The run's identity is the sha256 of its points.csv: the same data added twice (by one bench
or two) is stored once. Each sample of the asked part is fitted as `benchkit fit` fits it:
both sweep branches together (fits.fit_branches, model "auto" unless told), weighted by
C_std_F/sqrt(n_readings) (DEVELOPERS.md, "File formats": run directory), points flagged overload, current_limit or
bias_readback left out: the run is read by benchkit.sweep.rundir, the reader `benchkit fit` uses, so
a run added directly and the curve file `benchkit fit` wrote from it are the same curve (same
content hash, stored once).
The series resistance stored with a curve (for the SPICE export) is the median Rs over the
fitted points, or D/(2*pi*f*Cs) when only D was read (Cs = Cp*(1 + D^2) for a parallel
reading) [published: impedance-measurement handbook relations].
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from benchkit.sweep import rundir, runlog
from benchkit.errors import UserError
from benchkit.library import fitsbridge
from benchkit.library.store import Library, RunInfo
from benchkit.sweep.tempgroups import split_by_temperature


@dataclass
class FittedCurve:
    sample_id: str
    branch: str
    curve: object
    esr_ohm: float | None
    n_points: int
    curve_id: int | None = None
    added: bool = False


@dataclass
class AddRunSummary:
    run_dir: Path
    part_id: str
    points_sha256: str
    already_present: bool
    curves: list[FittedCurve] = field(default_factory=list)

    @property
    def added(self) -> int:
        return sum(1 for c in self.curves if c.added)


def _float(text: str) -> float:
    try:
        return float(text) if text != "" else math.nan
    except ValueError:
        return math.nan


def esr_estimate(rows: list[dict[str, str]]) -> float | None:
    """Median series resistance of the rows (Rs, else from D), None if neither was read."""
    rs = np.array([_float(r["Rs_ohm"]) for r in rows])
    rs = rs[np.isfinite(rs) & (rs > 0)]
    if rs.size:
        return float(np.median(rs))
    vals = []
    for r in rows:
        D, f, C = _float(r["D"]), _float(r["freq_Hz"]), _float(r["C_F"])
        if not (math.isfinite(D) and math.isfinite(f) and math.isfinite(C) and D > 0 and f > 0 and C > 0):
            continue
        Cs = C * (1.0 + D * D) if r["function"].upper().startswith("CP") else C  # Cs = Cp*(1 + D^2)
        vals.append(D / (2.0 * math.pi * f * Cs))  # D = w*Cs*Rs
    return float(np.median(vals)) if vals else None


def run_catalogue(meta: dict, part_id: str):
    """The catalogue fields of part_id as the run recorded them (run.json samples[].part), or None."""
    from benchkit.library.records import PartRecord

    for s in meta.get("samples") or []:
        part = s.get("part") if isinstance(s, dict) else None
        if isinstance(part, dict) and (part.get("id") or part.get("part_id")) == part_id:
            return PartRecord.from_any(part)
    return None


def parts_in_run(run_dir: Path) -> list[str]:
    """The part ids a run directory has points of, sorted."""
    rows, _ = runlog.read_points(run_dir)
    return sorted({r["part_id"] for r in rows if r["part_id"]})


def _attach_wideband(curves: dict, run_dir: Path, sample_id: str, where: str) -> None:
    """Z(f) per bias (a plan with a frequency list) rides on the sample's primary curve."""
    from benchkit.sweep.impedance import wideband_model

    rows, _ = runlog.read_points(Path(run_dir))
    wb = wideband_model(rows, sample_id, None, where)
    if wb is not None and curves:
        primary = "rising" if "rising" in curves else next(iter(curves))
        curves[primary].wideband = wb


def add_run_parts(lib: Library, run_dir: Path, part_id: str | None = None, *, all_parts: bool = False,
                  model: str = "auto", allow_incomplete: bool = False,
                  record_path: bool = True) -> list[AddRunSummary]:
    """`benchkit library add RUN_DIR [--part ID | --all-parts]`: one summary per part filed.

    Every part of an --all-parts filing must be in the library or in the run's own catalogue
    copy, checked before any fit. record_path False stores no path with the run (a run filed
    over HTTP was never on this machine).
    """
    if all_parts and part_id:
        raise UserError("give --part ID or --all-parts, not both")
    if all_parts:
        part_ids = parts_in_run(run_dir)
        meta = runlog.read_run(run_dir)
        missing = [p for p in part_ids if not lib.has_part(p) and run_catalogue(meta, p) is None]
        if missing:
            lib.part(missing[0])  # the one-line "not in the library" error, before any fit
    else:
        part_ids = [part_id]
    return [add_run_dir(lib, run_dir, p, model=model, allow_incomplete=allow_incomplete, record_path=record_path)
            for p in part_ids]


def add_run_dir(lib: Library, run_dir: Path, part_id: str | None, *, model: str = "auto",
                allow_incomplete: bool = False, record_path: bool = True) -> AddRunSummary:
    meta = runlog.read_run(run_dir)
    status = meta.get("status")
    if status == "running" and not allow_incomplete:
        raise UserError(f"{run_dir}: run.json says the run is still running (or it crashed); "
                        f"finish or resume it first, or add it anyway with --allow-incomplete")
    data = rundir.read_run_dir(Path(run_dir), action="added")
    meta, points_path, sha = data.meta, data.points_path, data.points_sha256
    samples = data.with_points()
    in_run = sorted({s.part_id for s in samples.values() if s.part_id})
    if part_id is None:
        if len(in_run) != 1:
            raise UserError(f"{run_dir}: the run holds parts {', '.join(in_run) or '(none named)'}; "
                            f"choose one with --part ID, or add them all with --all-parts")
        part_id = in_run[0]
    if part_id not in in_run:
        raise UserError(f"{run_dir}: the run has no points of part {part_id!r}; it holds {', '.join(in_run)}")
    new_parts = []
    if not lib.has_part(part_id):
        catalogue = run_catalogue(meta, part_id)
        if catalogue is None:
            lib.part(part_id)  # raises the one-line "not in the library" error
        new_parts = [catalogue]  # filed with the curves, in one transaction
    summary = AddRunSummary(Path(run_dir), part_id, sha, lib.has_run(sha, part_id))
    if summary.already_present:
        return summary
    for sample_id in sorted(samples):
        smp = samples[sample_id]
        if smp.part_id != part_id:
            continue
        source = {"points_sha256": sha, "run_id": meta.get("run_id"), "sample_id": sample_id,
                  "part_id": part_id}
        for temp_C, group in split_by_temperature(smp):  # one curve per temperature of the run
            at = "" if group is smp else f" at {temp_C:.1f} degC"
            try:
                outcome = fitsbridge.fit_branches(
                    group.bias_V, group.C_F, group.branch, group.sigma_F, model=model,
                    conditions=rundir.fit_conditions(meta, group.rows), source=source,
                    part_id=part_id, sample_id=sample_id)
            except fitsbridge.fits_errors() as exc:
                raise UserError(f"{points_path}: sample {sample_id}{at}: {exc}") from None
            _attach_wideband(outcome.curves, run_dir, sample_id, str(points_path))
            for branch, curve in outcome.curves.items():
                brows = group.select(branch).rows
                summary.curves.append(FittedCurve(sample_id, branch, curve, esr_estimate(brows), len(brows)))
    run = RunInfo(sha, meta.get("run_id"), str(Path(run_dir).resolve()) if record_path else None, status, meta)
    ids = lib.add_curves([(fc.curve, fc.esr_ohm) for fc in summary.curves], part_id=part_id, run=run,
                         where=str(run_dir), new_parts=new_parts)
    for fc, (cid, added) in zip(summary.curves, ids):
        fc.curve_id, fc.added = cid, added
    return summary
