"""Resuming a run: the samples and parts it stored, the adaptive points it had planned, and
the check that the rows on disk are this run's first planned points."""

from __future__ import annotations

from dataclasses import fields, replace
from typing import Mapping

from benchkit.catalogue import PartSpec
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
    planned = [p for sw in sweeps for p in sw.points]
    if len(rows) > len(planned):
        raise UserError(f"{run_dir}/points.csv: {len(rows)} rows but the plan has {len(planned)} points; not this run's file")
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
