"""Bench time: a uniform sweep against settle detection plus adaptive bias steps.

For each demo part, on a fresh simulated bench with a virtual clock (so a part starts from
rest and an hour of dwell passes in no time, while every command still goes through pyvisa
and TCP), two sweeps over the same range, 0 V to the top (the rated voltage rounded down to
the uniform step) and back:

- uniform: 0.5 V steps up and down, a fixed 5 s dwell, 3 readings per point;
- adaptive: settle detection (the plan's [settle], SETTLE: the settled value predicted from
  the relaxation fit, its uncertainty in percent of C0) and adaptive steps (the plan's
  [adaptive], ADAPTIVE, with the default stepped first loop: each step aimed at a change of
  C of coarse_step_pct_of_C0); the dwell's readings are the point's readings.

Both are fitted per branch with model "auto" (benchkit.sweep.adaptive.fit_branch: fits.fit_sweep
with pooled per-point sigma) and compared with the bench's true settled curve over each fitted
curve's valid range: the rising branch with SimBench.true_settled_C_F, the falling branch
with SimBench.true_settled_C_F(turn_V = top), because the sweep turns at its top while
the bench's falling truth is that of a turn far out (the two differ over about twice the
coercive voltage below the top). Errors are in percent of C0, the true rising value at 0 V.
Bench time is the run's clock time from start to the end of the final ramp to 0 V
(discharge wait 0 s in both plans, so it does not count for either). Each recorded point is
also held against the true settled value at its bias (point_z): a rule that reads before the
part has settled can keep the fit within its target while its points claim more than they
know, and only this shows it.

Seeds. The adaptive sweep's course depends on the meter's noise (which points the planner
adds, which law the fit chooses), so it runs once per seed of SEEDS (the simulated bench's
noise seed) and each part is judged by its worst seed: a target met on one noise draw only
is not met. The uniform sweep takes the same clock time at every seed and runs at seed 0.
"""

from __future__ import annotations

import math
import shutil
import time
from pathlib import Path

import numpy as np
from benchkit.benchmarks.table import _f
from benchkit.commands.sim import demo_bench

UNIFORM_STEP_V = 0.5
UNIFORM_DWELL_S = 5.0
N_READINGS = 3
LIMITS = {"current_limit_A": 0.01, "max_ramp_V_per_s": 5.0, "discharge_wait_s": 0.0}
# One adaptive plan for every part. Settle detection by prediction (benchkit/sweep/settle.py,
# prediction rule): each point records the settled value read off the relaxation fit of its
# dwell, once its standard uncertainty is within 0.15 % of C0 (the 0.5 % target is a k = 2
# band of the fitted curve, which averages over the points); the part charges through the
# fixture's feed resistor (10 kohm on the demo bench, instruments/sim/fixture.py Wiring) for
# at least min_dwell_s 0.5 s and CHARGE_TIME_CONSTANTS (8) times R*C of the C it reads at
# that bias (times CHARGE_C_MARGIN, at most the largest C its tolerance allows: 2.1 s for a
# 22 uF part) before the fit's readings, as a charging tail would pass for a fast relaxation.
SETTLE = {"max_prediction_u_pct_of_C0": 0.15, "max_tau_s": 20.0, "max_dwell_s": 60.0,
          "min_dwell_s": 0.5, "window_s": 1.0, "feed_R_ohm": 10e3}
ADAPTIVE = {"target_band_pct_of_C0": 0.5, "max_points": 40, "coarse_points": 7}
TARGET_RATIO = 0.25
TARGET_ERROR_PCT = 0.5
ERROR_GRID_POINTS = 401
SEEDS = (0, 1, 2)  # noise seeds of the adaptive sweep; --quick runs the first only
QUICK_PARTS = ("BD-1001", "BD-1008")
QUICK_TOP_V = 3.0  # --quick: only checks that everything runs, so short sweeps


def top_V(rated_V: float, step_V: float = UNIFORM_STEP_V) -> float:
    """The top of both sweeps: the rated voltage rounded down to a whole number of steps."""
    return round(math.floor(rated_V / step_V + 1e-9) * step_V, 10)


def uniform_plan(slot, top: float) -> dict:
    return {
        "name": f"bench-uniform-{slot['part_id']}",
        "samples": [slot],
        "bias": {"start_V": 0.0, "stop_V": top, "step_V": UNIFORM_STEP_V,
                 "branches": ["rising", "falling"]},
        "measure": {"dwell": "fixed", "dwell_s": UNIFORM_DWELL_S, "n_readings": N_READINGS},
        "limits": dict(LIMITS),
    }


def adaptive_plan(slot, top: float, settle=None, adaptive=None) -> dict:
    return {
        "name": f"bench-adaptive-{slot['part_id']}",
        "samples": [slot],
        "bias": {"points_V": [0.0, top], "branches": ["rising", "falling"]},
        "measure": {"dwell": "settle", "n_readings": N_READINGS},
        "settle": dict(settle or SETTLE),
        "adaptive": dict(adaptive or ADAPTIVE),
        "limits": dict(LIMITS),
    }


def _truth(bench, channel: int, bias_V: float, branch: str, cond: dict, top: float) -> float:
    return bench.true_settled_C_F(channel, bias_V, branch, freq_Hz=cond["freq_Hz"],
                                  ac_level_Vrms=cond["ac_level_Vrms"], temp_C=25.0,
                                  turn_V=top if branch == "falling" else None,
                                  function=cond["function"])


def point_z(rows, truth) -> np.ndarray:
    """(recorded C - true settled C) / its standard uncertainty, for each row that gives one:
    C_std_F over sqrt(n_readings), the standard error of a mean of readings, which is how
    the prediction rule records its own u(C_inf) too (benchkit/sweep/point.py). truth(row)
    is the true settled C at the row's bias and branch. For honest uncertainties about 95 %
    of |z| lie within 2 and the rms is about 1 [standard: GUM, JCGM 100:2008, normal
    coverage]; a point read before it settled shows up here, not in the fit's error."""
    z = []
    for r in rows:
        C, s, n = r.get("C_F"), r.get("C_std_F"), r.get("n_readings")
        if C in (None, "") or s in (None, "") or not n or float(s) <= 0:
            continue
        z.append((float(C) - truth(r)) / (float(s) / math.sqrt(int(n))))
    return np.asarray(z, dtype=float)


def run_one(plan_dict: dict, run_dir: Path, seed: int = 0) -> dict:
    """One sweep on a fresh simulated bench; its bench time, points and fit errors."""
    from benchkit.sweep.adaptive import fit_branch
    from benchkit.sweep.plan import parse_plan
    from benchkit.sweep.runlog import read_points, read_run
    from benchkit.sweep import measured_point, run_sweep
    from instruments.clock import VirtualClock

    plan = parse_plan(plan_dict, plan_dict["name"])
    slot = plan_dict["samples"][0]
    clock = VirtualClock()
    wall0 = time.perf_counter()
    with demo_bench(clock=clock, seed=seed) as bench:
        t0 = clock.now()
        result = run_sweep(bench, plan, run_dir, handle_signals=False)
        bench_s = clock.now() - t0
        wall_s = time.perf_counter() - wall0
        if result.status != "complete":
            raise RuntimeError(f"{plan.name}: sweep {result.status}: {result.reason}")
        meta = read_run(run_dir)
        rows, _ = read_points(run_dir)
        cond = meta["samples"][0]["conditions"]
        top = max(abs(float(r["bias_set_V"])) for r in rows)
        points = [measured_point(r) for r in rows]
        C0 = _truth(bench, slot["channel"], 0.0, "rising", cond, top)
        errors, models = {}, {}
        for branch in ("rising", "falling"):
            out = fit_branch(points, branch, "auto")
            lo, hi = out.curve.valid_range_V
            grid = np.linspace(lo, hi, ERROR_GRID_POINTS)
            truth = np.array([_truth(bench, slot["channel"], v, branch, cond, top) for v in grid])
            errors[branch] = float(np.max(np.abs(np.asarray(out.curve.C(grid)) - truth)) / C0 * 100.0)
            models[branch] = out.curve.model
        z = point_z(rows, lambda r: _truth(bench, slot["channel"], float(r["bias_set_V"]),
                                           r["branch"], cond, top))
    flags = [f for r in rows for f in r["flags"].split(";") if f]
    rec = {
        "bench_s": bench_s,
        "points": len(rows),
        "max_error_pct_of_C0": max(errors.values()),
        "max_error_pct_of_C0_by_branch": errors,
        "models": models,
        "max_dwell_points": flags.count("max_dwell"),
        "mean_settle_s": float(np.mean([float(r["settle_s"]) for r in rows])),
        "points_rms_z": float(np.sqrt(np.mean(z * z))) if z.size else None,
        "points_share_beyond_2u": float(np.mean(np.abs(z) > 2.0)) if z.size else None,
        "wall_s": wall_s,
        "run_dir": str(run_dir),
    }
    ad = meta["samples"][0].get("adaptive")
    if ad is not None:
        rec.update(stop_reason=ad["stop_reason"], passes=ad["passes"],
                   band_pct_of_C0={b: s["band_pct_of_C0"] for b, s in ad["status"].items()})
    return rec


def run(out_dir: Path, quick: bool = False, parts=None, log=print) -> dict:
    """Both sweeps for each demo part (QUICK_PARTS up to QUICK_TOP_V with quick); by part id."""
    from benchkit.catalogue import DEMO_FIXTURE, DEMO_PARTS, load_fixture, load_parts

    cat = load_parts(DEMO_PARTS)
    fixture = load_fixture(DEMO_FIXTURE, cat)
    wanted = list(parts) if parts else (list(QUICK_PARTS) if quick else [s.part_id for s in fixture])
    runs = Path(out_dir) / "runs"
    if runs.exists():
        shutil.rmtree(runs)  # this benchmark's own run directories from a previous run
    seeds = SEEDS[:1] if quick else SEEDS
    results = {}
    for slot in fixture:
        if slot.part_id not in wanted:
            continue
        sref = {"sample_id": slot.sample_id, "part_id": slot.part_id, "channel": slot.channel}
        top = top_V(cat[slot.part_id].rated_V)
        if quick:
            top = min(top, QUICK_TOP_V)
        u = run_one(uniform_plan(sref, top), runs / slot.part_id / "uniform")
        by_seed = [run_one(adaptive_plan(sref, top), runs / slot.part_id / f"adaptive-seed{k}",
                           seed=k) for k in seeds]
        a = by_seed[0]
        ratios = [r["bench_s"] / u["bench_s"] for r in by_seed]
        errors = [r["max_error_pct_of_C0"] for r in by_seed]
        results[slot.part_id] = {
            "description": cat[slot.part_id].description,
            "top_V": top,
            "uniform": u,
            "adaptive": a,  # seed 0
            "bench_time_ratio": ratios[0],
            "seeds": {"seeds": list(seeds), "bench_time_ratio": ratios,
                      "max_error_pct_of_C0": errors,
                      "passes": [r.get("passes") for r in by_seed],
                      "points_rms_z": [r["points_rms_z"] for r in by_seed],
                      "stop_reason": [r.get("stop_reason") for r in by_seed]},
            "worst_bench_time_ratio": max(ratios),
            "worst_max_error_pct_of_C0": max(errors),
            "meets_time_target": max(ratios) <= TARGET_RATIO,
            "meets_error_target": max(errors) <= TARGET_ERROR_PCT,
        }
        log(f"bench time {slot.part_id}: uniform {u['bench_s']:.0f} s / {u['points']} points, "
            f"adaptive {a['bench_s']:.0f} s / {a['points']} points, ratio "
            f"{' '.join(f'{x:.2f}' for x in ratios)} (seeds {', '.join(map(str, seeds))}), "
            f"max error {u['max_error_pct_of_C0']:.3f} % / "
            f"{' '.join(f'{x:.3f}' for x in errors)} % of C0; recorded points' rms z "
            f"{' '.join(_f(r['points_rms_z'], '.2f') for r in by_seed)}")
    missing = sorted(set(wanted) - set(results))
    if missing:
        raise ValueError(f"no demo part {', '.join(missing)} on the demo fixture")
    tot_u = sum(r["uniform"]["bench_s"] for r in results.values())
    tot_a = sum(r["adaptive"]["bench_s"] for r in results.values())
    return {
        "what": "bench seconds of a uniform sweep (0.5 V steps, fixed 5 s dwell) against settle "
                "detection plus adaptive steps; max |fit - true settled curve| in % of C0",
        "settings": {"uniform_step_V": UNIFORM_STEP_V, "uniform_dwell_s": UNIFORM_DWELL_S,
                     "seeds": list(seeds),
                     "n_readings": N_READINGS, "settle": SETTLE, "adaptive": ADAPTIVE,
                     "limits": LIMITS},
        "target": {"max_bench_time_ratio": TARGET_RATIO, "max_error_pct_of_C0": TARGET_ERROR_PCT},
        "parts": results,
        "total": {"uniform_bench_s": tot_u, "adaptive_bench_s": tot_a,
                  "bench_time_ratio": tot_a / tot_u if tot_u else None},
    }
