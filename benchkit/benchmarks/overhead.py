"""Software overhead per measured point against a bare pyvisa query round trip.

Baseline: `*IDN?` through pyvisa with the pyvisa-py backend to the simulated meter on
loopback TCP, the same link the engine uses (median of many round trips after a warm-up).
Engine: the real (wall) time per measured point of a uniform sweep on a virtual clock, so no
dwell or ramp time is waited for and what is left is the software and the link: each point
ramps the supply (one set per step), reads the meter n_readings times (INITiate + FETCh?
each), reads back the AC level, the supply's voltage and current and the temperature, writes
a fsync'ed row. Timed between the first and the last point (instrument opening excluded).
The ratio is engine time per point over the bare round trip: roughly the number of exchanges
per point plus what the engine adds to each.
"""

from __future__ import annotations

import statistics
import time
from pathlib import Path

from benchkit.benchmarks.bench_time import top_V, uniform_plan
from benchkit.commands.sim import demo_bench

ENGINE_PART = "BD-1004"  # 25 V: 101 points at 0.5 V steps (the quick run uses 4 V of it)
QUICK_TOP_V = 4.0


def idn_round_trip_s(resource: str, n: int, warmup: int = 20) -> dict:
    """Median and mean wall time of one `*IDN?` query through pyvisa-py."""
    import pyvisa

    from instruments.drivers import load_profile

    prof = load_profile("generic-lcr")
    rm = pyvisa.ResourceManager("@py")
    try:
        inst = rm.open_resource(resource, read_termination=prof.read_termination,
                                write_termination=prof.write_termination, timeout=5000)
        try:
            for _ in range(warmup):
                inst.query("*IDN?")
            times = []
            for _ in range(n):
                t = time.perf_counter()
                inst.query("*IDN?")
                times.append(time.perf_counter() - t)
        finally:
            inst.close()
    finally:
        rm.close()
    return {"median_s": statistics.median(times), "mean_s": statistics.fmean(times), "n": n}


class _PointClock:
    """A progress sink that notes the wall time of every saved point."""

    def __init__(self):
        self.times: list[float] = []
        self.total = 0

    def start(self, total, done=0):
        self.total = total

    def point(self, done, text):
        self.times.append(time.perf_counter())

    def note(self, text):
        pass

    def finish(self, status):
        pass


def run(out_dir: Path, quick: bool = False, log=print) -> dict:
    from benchkit.catalogue import DEMO_FIXTURE, DEMO_PARTS, load_fixture, load_parts

    from benchkit.sweep.plan import parse_plan
    from benchkit.sweep import run_sweep
    from instruments.clock import VirtualClock

    cat = load_parts(DEMO_PARTS)
    slot = next(s for s in load_fixture(DEMO_FIXTURE, cat) if s.part_id == ENGINE_PART)
    sref = {"sample_id": slot.sample_id, "part_id": slot.part_id, "channel": slot.channel}
    top = QUICK_TOP_V if quick else top_V(cat[ENGINE_PART].rated_V)
    plan_dict = uniform_plan(sref, top)
    plan_dict["name"] = "bench-overhead"
    run_dir = Path(out_dir) / "runs" / "overhead"
    if run_dir.exists():
        import shutil

        shutil.rmtree(run_dir)
    with demo_bench(clock=VirtualClock()) as bench:
        idn = idn_round_trip_s(bench.resources["meter"], 300 if quick else 2000)
        sink = _PointClock()
        result = run_sweep(bench, parse_plan(plan_dict, "bench-overhead"), run_dir,
                           progress=sink, handle_signals=False)
    if result.status != "complete" or len(sink.times) < 2:
        raise RuntimeError(f"overhead sweep {result.status}: {result.reason}")
    per_point = (sink.times[-1] - sink.times[0]) / (len(sink.times) - 1)
    ratio = per_point / idn["median_s"]
    log(f"overhead: {per_point * 1e3:.2f} ms per point, *IDN? round trip "
        f"{idn['median_s'] * 1e6:.0f} us, ratio {ratio:.0f}")
    return {
        "what": "engine wall time per measured point (virtual clock, no dwell) over a bare "
                "pyvisa-py *IDN? round trip to the same simulated meter",
        "idn_round_trip_s": idn["median_s"],
        "idn_round_trip_mean_s": idn["mean_s"],
        "idn_queries": idn["n"],
        "engine_point_wall_s": per_point,
        "engine_points": len(sink.times),
        "n_readings": plan_dict["measure"]["n_readings"],
        "overhead_ratio": ratio,
    }
