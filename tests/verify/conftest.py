"""Measurements for the verification tests.

`lot_run`: the demo lot (six samples of BD-1004) swept by the real sweep engine on the
simulated bench with a virtual clock, once per session. `write_run` writes a small run
directory in the run-directory format of DEVELOPERS.md from a formula, for the cases the simulated
lot does not cover (other parts in the same run, missing fields).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
from pathlib import Path

import numpy as np
import pytest
from benchkit.commands.sim import demo_bench

LOT_BIAS_V = np.arange(0.0, 25.0 + 1e-9, 2.5)
REPO = Path(__file__).resolve().parents[2]

COLUMNS = (
    "run_id", "sample_id", "part_id", "channel", "step_index", "branch", "repeat",
    "bias_set_V", "bias_meas_V", "bias_current_A", "function", "freq_Hz",
    "ac_level_set_Vrms", "ac_level_dut_Vrms", "C_F", "C_std_F", "D", "Rs_ohm", "n_readings",
    "temp_C", "t_s", "dwell_s", "settle_s", "drift_pct_per_s", "flags", "utc",
)


@pytest.fixture(scope="session")
def lot_run(tmp_path_factory) -> Path:
    from benchkit.sweep.plan import parse_plan
    from benchkit.sweep import run_sweep
    from instruments.clock import VirtualClock
    from instruments.sim import SimBench

    plan = parse_plan({
        "name": "lot acceptance",
        "bias": {"start_V": 0.0, "stop_V": 25.0, "step_V": 2.5, "branches": ["rising"]},
        # 15 s dwell = 6 relaxation times of BD-1004 (tau_relax_s 2.5 in data/parts.toml)
        "measure": {"dwell_s": 15.0, "n_readings": 4},
        "limits": {"current_limit_A": 0.01, "max_ramp_V_per_s": 5.0, "discharge_wait_s": 5.0},
    }, "verify test plan")
    out = tmp_path_factory.mktemp("lot") / "run"
    with demo_bench(clock=VirtualClock(), lot=True, seed=7) as bench:
        result = run_sweep(bench, plan, out, handle_signals=False)
    assert result.status == "complete"
    return out


@pytest.fixture(scope="session")
def lot_truth() -> dict:
    """Noise-free settled C of every lot sample at LOT_BIAS_V, from the simulated physics."""
    from instruments.clock import VirtualClock
    from benchkit.catalogue import DEMO_LOT, DEMO_PARTS, load_lot, load_parts
    from benchkit.commands.sim import simulated_parts
    from instruments.sim.physics import SimulatedPart

    parts = load_parts(DEMO_PARTS)
    simulated = simulated_parts(parts)
    out = {}
    for s in load_lot(DEMO_LOT, parts):
        p = SimulatedPart(simulated[s.part_id], VirtualClock(), np.random.default_rng(0), s)
        out[s.sample_id] = np.array([p.true_settled_C_F(v) for v in LOT_BIAS_V])
    return out


@pytest.fixture(scope="session")
def lot_samples(lot_run):
    """The lot's samples fitted once (model auto), as verify sees them."""
    from benchkit.verify.measured import load_inputs

    return load_inputs([lot_run], "BD-1004")


def claim_text(part_id, bias_V, C_F, tolerance="+-15%", freq_Hz=1000, ac_level_Vrms=1.0,
               temp_C=25, age_h=None, column="C_F") -> str:
    lines = ["# format = benchkit-claim", "# version = 1", f"# part_id = {part_id}",
             "# supplier = test supplier (invented)", f"# freq_Hz = {freq_Hz}",
             f"# ac_level_Vrms = {ac_level_Vrms}"]
    if temp_C is not None:
        lines.append(f"# temp_C = {temp_C}")
    if age_h is not None:
        lines.append(f"# age_h = {age_h}")
    if tolerance is not None:
        lines.append(f"# tolerance = {tolerance}")
    lines.append(f"bias_V,{column}")
    lines += [f"{v!r},{c!r}" for v, c in zip(map(float, bias_V), map(float, C_F))]
    return "\n".join(lines) + "\n"


def write_run(run_dir: Path, samples, bias_V, *, noise_frac=1e-4, n_readings=4, seed=0,
              freq_Hz=1000.0, ac_level_Vrms=1.0, temp_C=25.0, run_id="run-test-0001",
              extra_sample_fields=None) -> Path:
    """A run directory (DEVELOPERS.md, "File formats": run directory) from formulas: samples = [(sample_id, part_id,
    channel, part_dict, C_of_V)]. Each point is the mean of n_readings readings with Gaussian
    relative noise noise_frac."""
    rng = np.random.default_rng(seed)
    run_dir.mkdir(parents=True)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(COLUMNS)
    t = 0.0
    for sid, pid, ch, _part, C_of_V in samples:
        for i, v in enumerate(bias_V):
            c = float(C_of_V(v))
            r = c * (1.0 + noise_frac * rng.standard_normal(n_readings))
            t += 10.0
            w.writerow([run_id, sid, pid, ch, i, "rising", 1, repr(float(v)), repr(float(v)),
                        0.0, "CPD", freq_Hz, ac_level_Vrms, ac_level_Vrms * 0.85,
                        repr(float(r.mean())), repr(float(r.std(ddof=1))), 0.02, 0.01,
                        n_readings, temp_C, t, 10.0, 10.0, 0.0, "", "2026-01-01T00:00:00.000Z"])
    text = buf.getvalue()
    (run_dir / "points.csv").write_text(text)
    sample_entries = []
    for sid, pid, ch, part, _ in samples:
        e = {"sample_id": sid, "part_id": pid, "channel": ch, "part": part,
             "conditions": {"function": "CPD", "freq_Hz": freq_Hz, "ac_level_Vrms": ac_level_Vrms}}
        e.update((extra_sample_fields or {}).get(sid, {}))
        sample_entries.append(e)
    meta = {"format": "benchkit-run", "version": 1, "run_id": run_id, "software_version": "test",
            "status": "complete", "reason": None, "start_utc": "2026-01-01T00:00:00Z",
            "end_utc": "2026-01-01T01:00:00Z", "clock": "virtual", "plan": {},
            "instruments": {}, "samples": sample_entries,
            "conditions": {"function": "CPD", "freq_Hz": freq_Hz, "ac_level_Vrms": ac_level_Vrms,
                           "conditions_source": "test"},
            "points_file": "points.csv",
            "points_sha256": hashlib.sha256(text.encode()).hexdigest(), "events": []}
    (run_dir / "run.json").write_text(json.dumps(meta, indent=1))
    return run_dir


def part_dict(part_id="BD-1004"):
    from benchkit.catalogue import DEMO_PARTS, catalogue_dict, load_parts

    return catalogue_dict(load_parts(DEMO_PARTS)[part_id])


@pytest.fixture(scope="session")
def tools():
    """The helpers above, for tests (conftest modules are not importable by name)."""
    from types import SimpleNamespace

    return SimpleNamespace(claim_text=claim_text, write_run=write_run, part_dict=part_dict,
                           LOT_BIAS_V=LOT_BIAS_V, REPO=REPO)
