"""Helpers of the fault tests: small plans, the planned point list, run directories, and the
simulated bench a `benchkit measure --sim` call builds (kept so a test can ask it the truth)."""

from __future__ import annotations

import contextlib
import csv
import json
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "sweep"))

from sweep_helpers import flags_besides_level  # noqa: E402,F401  (re-exported for the fault tests)
from sweep_helpers import plan_text as sweep_plan_text  # noqa: E402  (one plan writer for both)

from benchkit.sweep.plan import build_sweeps, load_plan
from benchkit.catalogue import load_catalogue

PARTS = load_catalogue()
# demo fixture (data/fixture.toml): channel 1 holds FX-01 (BD-1001, 6.3 V), channel 3 FX-03
SAMPLES = [
    {"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1},
    {"sample_id": "FX-03", "part_id": "BD-1003", "channel": 3},
]


def plan_text(samples=SAMPLES, name="fault-plan", **sections) -> str:
    """0, 2, 4 V up and back down (5 points a sample), 1 s dwell, 2 readings a point."""
    return sweep_plan_text(samples=samples, name=name, **sections)


def write_plan(path: Path, **kw) -> Path:
    path.write_text(plan_text(**kw), encoding="utf-8")
    return path


def planned_keys(plan_path: Path) -> list[tuple[str, int, int, str, float]]:
    """(sample_id, repeat, step_index, branch, bias_V) of every planned point, in order."""
    from benchkit.sweep.plan import SampleRef

    plan = load_plan(plan_path, PARTS)
    samples = [SampleRef(**s) for s in plan.to_dict()["samples"]]
    return [(p.sample_id, p.repeat, p.step_index, p.branch, p.bias_V)
            for sw in build_sweeps(plan, samples, PARTS) for p in sw.points]


def row_keys(rows) -> list[tuple[str, int, int, str, float]]:
    return [(r["sample_id"], int(r["repeat"]), int(r["step_index"]), r["branch"],
             float(r["bias_set_V"])) for r in rows]


def read_rows(run_dir: Path) -> list[dict]:
    with open(run_dir / "points.csv", newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def read_meta(run_dir: Path) -> dict:
    return json.loads((run_dir / "run.json").read_text(encoding="utf-8"))


def flags_of(row) -> set[str]:
    return set(filter(None, row["flags"].split(";")))


@contextlib.contextmanager
def keep_benches(monkeypatch):
    """Every SimBench that demo_bench builds (e.g. inside `benchkit measure --sim`)."""
    from benchkit.commands import sim as sim_command

    made: list = []
    original = sim_command.demo_bench

    def demo(*args, **kwargs):
        bench = original(*args, **kwargs)
        made.append(bench)
        return bench

    monkeypatch.setattr(sim_command, "demo_bench", demo)
    yield made


class Spy:
    """Every message each simulated instrument executes, and where the links were dropped."""

    def __init__(self, bench, reset_on_drop: bool = False):
        self.log: list[tuple[str, str]] = []
        original = bench.faults.on_message

        def on_message(role, is_query):
            actions = original(role, is_query)
            if actions.drop:
                self.log.append((role, "<dropped>"))
                if reset_on_drop:  # the instrument restarted: back at its *RST values
                    bench.instruments[role].reset()
            return actions

        bench.faults.on_message = on_message
        for role, inst in bench.instruments.items():
            handle = inst.handle

            def spy(text, role=role, handle=handle):
                self.log.append((role, text))
                return handle(text)

            inst.handle = spy

    def after_drop(self, role: str) -> list[str]:
        """The messages `role` executed after its link was dropped."""
        msgs = [(r, t) for r, t in self.log if r == role]
        i = msgs.index((role, "<dropped>"))
        return [t for _, t in msgs[i + 1:]]
