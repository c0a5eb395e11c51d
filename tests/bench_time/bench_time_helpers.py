"""A bench of one simulated part driven directly through its physics, on a virtual clock.

No TCP here: the settle and adaptive logic are tested against instruments.sim.physics
(SimulatedPart) itself, so a test can also ask the noise-free truth at any moment. The
engine tests (test_engine_*.py) go through the simulated bench over pyvisa instead.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from benchkit.sweep.adaptive import MeasuredPoint
from instruments.clock import VirtualClock
from benchkit.catalogue import DEMO_PARTS, load_parts
from benchkit.commands.sim import simulated_parts
from instruments.sim.physics import SimulatedPart

PARTS = simulated_parts(load_parts(DEMO_PARTS))
READ_S = 0.1  # one meter reading takes this long on the bench clock (the sim meter's time)
RAMP_V_PER_S = 5.0


def part_spec(part_id: str, **sim_changes):
    """A demo part, with some of its physics changed (e.g. tau_relax_s)."""
    spec = PARTS[part_id]
    if sim_changes:
        spec = dataclasses.replace(spec, sim=dataclasses.replace(spec.sim, **sim_changes))
    return spec


class PhysicsBench:
    """One part, a ramping supply (0.5 V steps at RAMP_V_PER_S) and a meter, on one clock."""

    def __init__(self, spec, seed: int = 0):
        self.clock = VirtualClock()
        self.part = SimulatedPart(spec, self.clock, np.random.default_rng(seed))
        self.freq_Hz = self.part.std_freq_Hz
        self.level_Vrms = self.part.std_level_Vrms
        self.V = 0.0
        self.readings = 0

    def probe(self) -> float:
        """One noisy meter reading (Cp), READ_S of bench time."""
        self.clock.sleep(READ_S)
        self.readings += 1
        return self.part.measure(self.freq_Hz, self.level_Vrms).Cp_F

    def C_true_now(self) -> float:
        """Noise-free Cp at this moment (relaxation still in progress included)."""
        return self.part.reading(self.freq_Hz, self.level_Vrms).Cp_F

    def ramp(self, target_V: float, max_step_V: float = 0.5) -> None:
        delta = target_V - self.V
        n = math.ceil(abs(delta) / max_step_V - 1e-9) if delta else 0
        start, prev = self.V, self.V
        for k in range(1, n + 1):
            v = target_V if k == n else start + delta * k / n
            self.clock.sleep(abs(v - prev) / RAMP_V_PER_S)
            self.part.set_bias(v)
            prev = v
        self.V = target_V

    def point(self, bias_V: float, policy, n_readings: int = 3):
        """Ramp, dwell by the policy, read: (C mean, its standard error, policy result)."""
        self.ramp(bias_V)
        res = policy.wait(self.clock, self.probe)
        r = [self.probe() for _ in range(n_readings)]
        return float(np.mean(r)), float(np.std(r, ddof=1) / math.sqrt(n_readings)), res


def run_adaptive(bench: PhysicsBench, planner, policy):
    """The loop the engine runs (benchkit.sweep): pass after pass; a later pass's rising
    points start from 0 V, its falling points from the top, each turning point reached and
    waited at by the dwell policy."""
    points, passes = [], []
    p = planner.first_pass()
    while p.points:
        passes.append(p)
        prev = None
        for branch, v in p.points:
            if p.index >= 2 and prev is None and branch == "rising" and bench.V != 0.0:
                bench.ramp(0.0)
                policy.wait(bench.clock, bench.probe)
            if p.index >= 2 and branch == "falling" and prev != "falling":
                bench.ramp(planner.top_V)
                policy.wait(bench.clock, bench.probe)
            c, s, _ = bench.point(v, policy)
            points.append(MeasuredPoint(branch, v, c, s))
            prev = branch
        p = planner.next_pass(points)
    bench.ramp(0.0)
    return points, passes, p


# --- run directories (engine tests) ----------------------------------------------------

def read_rows(run_dir):
    import csv

    with open(run_dir / "points.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def read_meta(run_dir):
    import json

    return json.loads((run_dir / "run.json").read_text(encoding="utf-8"))


def CtrlCAfter(n):
    """A Progress that presses Ctrl-C (SIGINT to this process) after the n-th saved point."""
    import io
    import os
    import signal

    from benchkit.sweep.progress import Progress

    class _CtrlC(Progress):
        def point(self, done, text):
            super().point(done, text)
            if done == n:
                os.kill(os.getpid(), signal.SIGINT)

    return _CtrlC(stream=io.StringIO(), tty=False)
