"""The fault matrix of the chamber: every chamber fault in the middle of a temperature run.

| fault (role chamber) | answer                                                       | status   |
|----------------------|--------------------------------------------------------------|----------|
| drop                 | reconnect, re-apply the rate and set point; link_recovered    | complete |
| timeout              | resync (*CLS, *OPC?) and retry; link_recovered                | complete |
| refuse               | the chamber reported -221: stop, bias off, chamber safe       | aborted  |
| refuse, count=2      | also the safe set point refused: run.json and stderr say so   | aborted  |
| unstable             | the air never holds the band: stop after max_soak_s           | aborted  |

Whatever happens: the supply really is at 0 V with its output off and the chamber's set point
really is the plan's safe temperature (the simulated bench's own state), run.json says so,
and every saved point is the next planned one. Sources: the pyvisa pitfalls of resync and
bounded reconnects, and "bias off, chamber to a safe temperature on every way out"
[common practice].
"""

from __future__ import annotations

import io
import sys
from pathlib import Path

import pytest

from benchkit.sweep import run_sweep
from benchkit.sweep.progress import Progress
from benchkit.sweep.runlog import read_run
from instruments.sim import Fault

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "sweep"))
from sweep_helpers import read_rows  # noqa: E402
from temp_helpers import chamber_bench, write_temp_plan  # noqa: E402

IO_TIMEOUT_S = 0.3


@pytest.fixture(scope="module")
def clean(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("clean")
    plan = write_temp_plan(tmp / "plan.toml", points=(25.0, 85.0), max_soak=3600.0)
    with chamber_bench() as bench:
        res = run_sweep(bench, plan, tmp / "run", handle_signals=False, io_timeout_s=IO_TIMEOUT_S)
        n = bench.faults.count("chamber")
    assert res.status == "complete"
    return plan, n, [(r["sample_id"], r["step_index"]) for r in read_rows(tmp / "run")]


class InjectAfter(Progress):
    """Injects a fault into the bench after the n-th saved point (the end of the first visit)."""

    def __init__(self, bench, n, spec):
        super().__init__(stream=io.StringIO(), tty=False)
        self.bench, self.n, self.spec = bench, n, spec

    def point(self, done, text):
        super().point(done, text)
        if done == self.n:
            self.bench.inject(self.spec)


@pytest.mark.parametrize("kind, status", [("drop", "complete"), ("timeout", "complete"),
                                          ("refuse", "aborted"), ("unstable", "aborted")])
def test_chamber_fault_mid_run(kind, status, clean, tmp_path):
    plan, n_msgs, planned = clean
    after = 0 if kind == "unstable" else n_msgs // 2
    spec = f"{kind}:role=chamber:after={after}"
    with chamber_bench(faults=[] if kind == "refuse" else [Fault.parse(spec)]) as bench:
        # refuse: armed when the first visit is done, so the next set point (85 degC) is refused
        progress = InjectAfter(bench, len(planned) // 2, "refuse:role=chamber") if kind == "refuse" else None
        res = run_sweep(bench, plan, tmp_path / "run", progress=progress, handle_signals=False,
                        io_timeout_s=IO_TIMEOUT_S)
        fired = [f.kind for f in bench.faults.fired]
        supply, chamber = bench.supply_state(), bench.chamber_state()
    assert fired == [kind]
    assert res.status == status, res.reason
    assert supply["output_on"] is False and supply["set_V"] == 0.0
    assert chamber["setpoint_C"] == 25.0
    meta = read_run(tmp_path / "run")
    assert meta["chamber_final"] == {"setpoint_C": 25.0, "confirmed": True}
    got = [(r["sample_id"], r["step_index"]) for r in read_rows(tmp_path / "run")]
    assert got == planned[: len(got)]
    events = meta["events"]
    if status == "complete":
        assert got == planned
        rec = [e for e in events if e["event"] == "link_recovered"]
        assert rec and rec[0]["role"] == "chamber"
    else:
        assert len(got) < len(planned)
        names = [e["event"] for e in events]
        assert names.index("chamber_safe") < names.index("abort")   # recorded on the way out
    if kind == "refuse":
        assert "-221" in res.reason and "chamber" in res.reason
        assert len(got) == len(planned) // 2        # the 25 degC visit done, 85 degC refused
    if kind == "unstable":
        assert "never held the band" in res.reason and len(got) == 0


def test_a_refused_safe_set_point_is_recorded_and_reported(tmp_path, capsys):
    # at 85 degC, the next set point (-55) and then the safe one (25) are both refused
    plan = write_temp_plan(tmp_path / "plan.toml", points=(25.0, 85.0, -55.0), max_soak=3600.0)
    with chamber_bench() as bench:
        res = run_sweep(bench, plan, tmp_path / "run", handle_signals=False,
                        progress=InjectAfter(bench, 12, "refuse:role=chamber:count=2"),
                        io_timeout_s=IO_TIMEOUT_S)
        supply, chamber = bench.supply_state(), bench.chamber_state()
    assert res.status == "aborted"
    assert supply["output_on"] is False and supply["set_V"] == 0.0   # the bias is off anyway
    meta = read_run(tmp_path / "run")
    assert meta["chamber_final"] == {"setpoint_C": 25.0, "confirmed": False}
    bad = [e for e in meta["events"] if e["event"] == "chamber_not_confirmed_safe"]
    assert bad and "by hand" in bad[0]["detail"]
    assert chamber["setpoint_C"] == 85.0              # it really did refuse
    assert "WARNING" in capsys.readouterr().err
