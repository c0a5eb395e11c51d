"""Resuming a run: the samples and parts it stored, the adaptive points it had planned, and
the check that the rows on disk are this run's first planned points.

Why so suspicious: run.json is a text file anyone can edit, and a resume puts voltage on
parts again. So the limits are derived anew from the catalogue and the plan (run.py), and
every one of them must agree with what run.json recorded; the rows were checked against
their digests when the run was reopened (benchkit/sweep/runlog.py, points.chain).
"""

from __future__ import annotations

import math
from dataclasses import fields, replace
from pathlib import Path
from typing import Mapping

from benchkit.catalogue import PartSpec, catalogue_dict, load_catalogue
from benchkit.errors import UserError
from benchkit.sweep.adaptive import measured_point
from benchkit.sweep.plan import PlannedPoint, SampleRef, SampleSweep


def samples_from_meta(meta: Mapping, run_dir) -> tuple[list[SampleRef], dict]:
    samples, parts = [], {}
    try:
        for s in meta["samples"]:
            samples.append(SampleRef(s["sample_id"], s["part_id"], int(s["channel"]),
                                     s.get("hours_since_heat_h")))
            parts[s["part_id"]] = PartSpec(**{f.name: s["part"][f.name] for f in fields(PartSpec) if f.name not in ("sim", "where")})
    except (KeyError, TypeError, ValueError) as exc:
        raise UserError(f"{run_dir}/run.json: field 'samples' is incomplete ({exc}); cannot resume") from None
    return samples, parts


def resume_catalogue(meta: Mapping, run_dir) -> dict:
    """The parts catalogue the run was planned from: the parts file it recorded, else the demo."""
    path = meta.get("parts_file")
    if path is not None and not isinstance(path, str):
        raise UserError(f"{run_dir}/run.json: field 'parts_file' must be a path; the file was edited")
    if path is not None and not Path(path).exists():
        raise UserError(f"{path}: the parts file run {meta.get('run_id')} was planned from is gone; "
                        "restore it to resume (its limits are checked against run.json)")
    return load_catalogue(path)


def check_against_record(meta: Mapping, run_dir, sweeps, recorded_parts: Mapping, wait_s: float,
                         above: list[str]) -> None:
    """Every limit derived from the catalogue and the plan must equal what run.json says."""
    where = f"{run_dir}/run.json"
    fix = "the run record was edited or the catalogue changed since the run started; restore it or start a new run"
    for i, sw in enumerate(sweeps, 1):
        rec = recorded_parts.get(sw.sample.part_id)
        if rec is None:
            raise UserError(f"{where}: samples[{i}]: part {sw.sample.part_id} not recorded; {fix}")
        now, then = catalogue_dict(sw.part), catalogue_dict(rec)
        for name in now:
            if now[name] != then[name]:
                raise UserError(f"{where}: samples[{i}].part.{name} = {then[name]!r} but the catalogue "
                                f"says {now[name]!r} for {sw.sample.part_id}; {fix}")
        stored = meta["samples"][i - 1]
        if stored.get("n_points") != len(sw.points):
            raise UserError(f"{where}: samples[{i}].n_points = {stored.get('n_points')!r} but the plan "
                            f"gives {len(sw.points)} points for {sw.sample.sample_id}; {fix}")
        cond = stored.get("conditions") or {}
        for name in ("function", "freq_Hz", "ac_level_Vrms"):
            if cond.get(name) != getattr(sw.conditions, name):
                raise UserError(f"{where}: samples[{i}].conditions.{name} = {cond.get(name)!r} but the "
                                f"plan gives {getattr(sw.conditions, name)!r}; {fix}")
    if len(meta["samples"]) != len(sweeps):
        raise UserError(f"{where}: field 'samples': {len(meta['samples'])} recorded, {len(sweeps)} planned; {fix}")
    rec_wait = meta.get("discharge_wait_s")
    if not isinstance(rec_wait, (int, float)) or isinstance(rec_wait, bool) or \
            not math.isclose(float(rec_wait), wait_s, rel_tol=1e-9, abs_tol=1e-9):
        raise UserError(f"{where}: field 'discharge_wait_s' = {rec_wait!r} but the plan gives "
                        f"{wait_s:g} s; {fix}")
    if meta.get("n_points_planned") != sum(len(sw.points) for sw in sweeps):
        raise UserError(f"{where}: field 'n_points_planned' = {meta.get('n_points_planned')!r} "
                        "differs from the plan's; " + fix)
    rec_above = (meta.get("above_rated") or {}).get("samples", [])
    if sorted(rec_above) != sorted(above):
        raise UserError(f"{where}: field 'above_rated.samples' = {rec_above!r} but the catalogue and "
                        f"the plan put {above!r} above rating; {fix}")


def retrace_path(sw: SampleSweep, start: int) -> list[float]:
    """The biases a resumed sample passes through, from 0 V, before its point `start`: every
    earlier point of the same repeat (loop), in order, so the interrupted branch restarts
    from 0 V with the bias history it had (a class-2 part's C depends on the path: rising
    and falling branches differ) [common practice; science notes 1, Miller model]."""
    first = sw.points[start]
    j0 = max(0, start - first.step_index)
    return [sw.points[j].bias_V for j in range(j0, start)]


def replay_adaptive(sw: SampleSweep, rows) -> SampleSweep:
    """The points an adaptive sample had planned when the run stopped: its planner is fed
    the rows on disk pass by pass (it is deterministic), so a resume measures exactly the
    points the interrupted session would have."""
    mine = [r for r in rows if r["sample_id"] == sw.sample.sample_id]
    points = list(sw.points)
    planner = sw.adaptive
    while len(mine) >= len(points) and not planner.stopped:
        nxt = planner.next_pass([measured_point(r) for r in mine[: len(points)]])
        points += [PlannedPoint(sw.sample.sample_id, nxt.index, len(points) + i, br, v)
                   for i, (br, v) in enumerate(nxt.points)]
    return replace(sw, points=tuple(points))


def check_prefix(rows, sweeps, run_id, run_dir) -> None:
    """The rows on disk must be the first planned points, in order, of this run."""
    n_planned = sum(len(sw.points) for sw in sweeps)
    if len(rows) > n_planned:
        raise UserError(f"{run_dir}/points.csv: {len(rows)} rows but the plan has {n_planned} points; not this run's file")
    planned = (p for sw in sweeps for p in sw.points)
    for n, (row, p) in enumerate(zip(rows, planned), start=2):
        ok = (
            row["run_id"] == run_id
            and row["sample_id"] == p.sample_id
            and row["repeat"] == str(p.repeat)
            and row["step_index"] == str(p.step_index)
            and row["branch"] == p.branch
            and abs(float(row["bias_set_V"]) - p.bias_V) <= 1e-9
        )
        if not ok:
            raise UserError(
                f"{run_dir}/points.csv: line {n} ({row['sample_id']} repeat {row['repeat']} step "
                f"{row['step_index']}) is not planned point {p.sample_id} repeat {p.repeat} step "
                f"{p.step_index} of run {run_id}; the file was edited or mixed with another run"
            )
