"""Helpers for the temperature-run tests: a two-sample chamber bench and a small plan."""

from __future__ import annotations

import io
import os
import signal
from pathlib import Path

from benchkit.catalogue import DEMO_PARTS, load_parts
from benchkit.catalogue.fixture import FixtureSlot
from benchkit.commands.sim import sim_bench
from benchkit.sweep.plan import load_plan
from benchkit.sweep.progress import Progress
from instruments.clock import VirtualClock

PARTS = load_parts(DEMO_PARTS)
SLOTS = [FixtureSlot(1, "T-04", "BD-1004"), FixtureSlot(2, "T-09", "BD-1009")]

PLAN = """
name = "temp-test"
[bias]
start_V = 0.0
stop_V = 12.0
step_V = {step_V}
branches = ["rising"]
[measure]
dwell_s = 1.0
n_readings = 2
[limits]
current_limit_A = 0.01
max_ramp_V_per_s = 5.0
discharge_wait_s = 0.5
[temperature]
points_C = {points}
order = "{order}"
safe_C = 25.0
ramp_rate_C_per_min = 6.0
[temperature.soak]
band_C = 1.0
stable_s = 120.0
drift_pct_per_min = 0.05
drift_checks = 2
poll_s = 30.0
max_soak_s = {max_soak}
"""


def write_temp_plan(path: Path, points=(25.0, 85.0), order="as-listed", max_soak=7200.0, step_V=6.0):
    path.write_text(PLAN.format(points=list(points), order=order, max_soak=max_soak, step_V=step_V),
                    encoding="utf-8")
    return load_plan(path, PARTS)


def chamber_bench(clock=None, faults=(), seed=0):
    return sim_bench(PARTS, SLOTS, clock=clock or VirtualClock(), faults=list(faults), seed=seed)


class SoakInterruptClock(VirtualClock):
    """A virtual clock that presses Ctrl-C (SIGINT to this process) at the next soak poll
    (a sleep of exactly poll_s) once armed."""

    def __init__(self, poll_s: float):
        super().__init__()
        self.poll_s = poll_s
        self.armed = False
        self.fired_at = None

    def sleep(self, seconds: float) -> None:
        if self.armed and self.fired_at is None and seconds == self.poll_s:
            self.fired_at = self.now()
            os.kill(os.getpid(), signal.SIGINT)
        super().sleep(seconds)


class ArmAfter(Progress):
    """Progress that arms the clock after the n-th saved point."""

    def __init__(self, clock, n):
        super().__init__(stream=io.StringIO(), tty=False)
        self.clock, self.n = clock, n

    def point(self, done, text):
        super().point(done, text)
        if done == self.n:
            self.clock.armed = True
