"""The uniform sweep on a real clock against its physics floor.

What the physics asks of a uniform sweep is its dwells, its ramps (the pauses that keep the
bias within the plan's rate) and the meter's measurement times; everything else (the
exchanges, the rows written and fsync'd, the engine's own code) is overhead. This runs a
short uniform sweep of the demo C0G part (no relaxation to speak of; a tiny R*C) on the
simulated bench with the real clock, records every sleep on that clock (the engine's ramp
pauses and dwells, the simulated meter's measurement time), and compares the wall time
between the first and the last saved point with the sum of the sleeps in that window.
"""

from __future__ import annotations

import threading
import time
from pathlib import Path

from benchkit.benchmarks.bench_time import uniform_plan
from benchkit.commands.sim import demo_bench

PART = "BD-1008"  # 10 nF C0G: charges through the fixture in microseconds
TOP_V = 1.5
STEP_V = 0.5
DWELL_S = 1.0
QUICK_DWELL_S = 0.3
TARGET_PCT = 2.0


class _SleepLog:
    """Every sleep on the clock, from any thread, with its start time (wall)."""

    def __init__(self, clock):
        self.clock = clock
        self.sleeps: list[tuple[float, float]] = []
        self._lock = threading.Lock()

    def __enter__(self):
        sleep = self.clock.sleep

        def logged(seconds):
            if seconds > 0:
                with self._lock:
                    self.sleeps.append((time.perf_counter(), float(seconds)))
            return sleep(seconds)

        self.clock.sleep = logged
        return self

    def __exit__(self, *exc):
        del self.clock.sleep

    def between(self, t0: float, t1: float) -> float:
        return sum(s for t, s in self.sleeps if t0 <= t < t1)


class _Points:
    def __init__(self):
        self.times: list[float] = []

    def start(self, total, done=0):
        pass

    def point(self, done, text):
        self.times.append(time.perf_counter())

    def note(self, text):
        pass

    def finish(self, status):
        pass


def run(out_dir: Path, quick: bool = False, log=print) -> dict:
    import shutil

    from benchkit.catalogue import DEMO_FIXTURE, DEMO_PARTS, load_fixture, load_parts
    from benchkit.sweep import run_sweep
    from benchkit.sweep.plan import parse_plan
    from instruments.clock import RealClock

    cat = load_parts(DEMO_PARTS)
    slot = next(s for s in load_fixture(DEMO_FIXTURE, cat) if s.part_id == PART)
    sref = {"sample_id": slot.sample_id, "part_id": slot.part_id, "channel": slot.channel}
    plan_dict = uniform_plan(sref, TOP_V)
    plan_dict["name"] = "bench-floor"
    plan_dict["bias"]["step_V"] = STEP_V
    plan_dict["measure"]["dwell_s"] = QUICK_DWELL_S if quick else DWELL_S
    plan = parse_plan(plan_dict, "bench-floor")
    run_dir = Path(out_dir) / "runs" / "floor"
    if run_dir.exists():
        shutil.rmtree(run_dir)
    clock = RealClock()
    sink = _Points()
    with demo_bench(clock=clock) as bench, _SleepLog(clock) as sleeps:
        result = run_sweep(bench, plan, run_dir, clock, progress=sink, handle_signals=False)
    if result.status != "complete" or len(sink.times) < 2:
        raise RuntimeError(f"floor sweep {result.status}: {result.reason}")
    t0, t1 = sink.times[0], sink.times[-1]
    wall = t1 - t0
    floor = sleeps.between(t0, t1)
    over = 100.0 * (wall / floor - 1.0)
    log(f"floor: uniform sweep of {len(sink.times)} points on a real clock, {wall:.3f} s "
        f"between the first and the last point against {floor:.3f} s of dwell, ramp and "
        f"measurement time: {over:+.2f} %")
    return {
        "what": "wall time of a uniform sweep on a real clock (first to last saved point) over "
                "the sum of its dwells, ramp pauses and meter measurement times in that window",
        "part": PART,
        "points": len(sink.times),
        "dwell_s": plan_dict["measure"]["dwell_s"],
        "wall_s": wall,
        "physics_floor_s": floor,
        "over_floor_pct": over,
        "target_pct": TARGET_PCT,
        "meets_target": over <= TARGET_PCT,
    }
