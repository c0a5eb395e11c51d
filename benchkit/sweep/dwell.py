"""Dwell policies: how long the engine waits at a new bias before it reads the part.

A fixed dwell waits the plan's dwell_s; settle detection (benchkit/sweep/settle.py) watches
the part's drift and stops waiting once it has settled. The engine calls one policy per run.
"""

from __future__ import annotations

from typing import Callable, Protocol

from benchkit.sweep.plan import Plan


class DwellPolicy(Protocol):
    """How long to wait at a new bias before reading (fixed, or settle detection).

    wait() returns settle_s as a float; a policy that watched the part may return a float
    that also carries `drift_pct_per_s` (its own drift estimate, which then goes into the
    row) and `flags` (words of benchkit.sweep.runlog.FLAGS, e.g. "max_dwell"): see
    benchkit.sweep.settle.SettleResult. `dwell_s` is what the row's dwell_s column records: the
    fixed dwell, or the longest a watching policy may wait.
    """

    name: str
    dwell_s: float

    def wait(self, clock, probe: Callable[[], float]) -> float:
        """Wait on `clock` (probe() reads C_F, NaN on overload); return settle_s."""


class FixedDwell:
    """Wait a fixed time: the reading is taken dwell_s after the bias was reached."""

    name = "fixed"

    def __init__(self, dwell_s: float):
        self.dwell_s = float(dwell_s)

    def wait(self, clock, probe: Callable[[], float]) -> float:
        clock.sleep(self.dwell_s)
        return self.dwell_s


def _settle_policy(plan: Plan) -> DwellPolicy:
    from benchkit.sweep.settle import SettleDetector

    return SettleDetector.from_plan(plan.settle)


DWELL_POLICIES: dict[str, Callable[[Plan], DwellPolicy]] = {
    "fixed": lambda plan: FixedDwell(plan.measure["dwell_s"]),
    "settle": _settle_policy,
}


def dwell_policy(plan: Plan) -> DwellPolicy:
    return DWELL_POLICIES[plan.measure["dwell"]](plan)
