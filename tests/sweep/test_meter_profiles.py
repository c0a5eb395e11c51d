"""Sweeps through meters reached by a profile alone: an independent meter of our own, pyvisa-sim
GPIB/USB-TMC resources, and the simulated meter's alt dialect with its internal bias and level
control. Readings are checked before they are believed.

Sources:
- the independent meter's truth is its own Landau-type law (tests/sweep/independent_meter.py);
  the fit must stay within 0.5 % of C0 of it over the swept range (the figure the issue asks);
- IEC 60384-1 clause 4.2.2 (science.md 2): class 2 <= 10 uF at 1 kHz, 1.0 +-0.2 Vrms across
  the part;
- "the bias always ends at 0 V with its output off" [common practice];
- handbook relations Cp = Cs/(1 + D^2) in the independent meter's replies.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))

from independent_meter import (PROFILE_HEAD, REPLY_D_FIRST, REPLY_STATUS,  # noqa: E402
                               IndependentMeter, LandauTruth, MeterServer)
from sweep_helpers import read_meta, read_rows, write_plan  # noqa: E402

from benchkit.catalogue import load_catalogue  # noqa: E402
from benchkit.commands.sim import demo_bench  # noqa: E402
from benchkit.sweep import run_sweep  # noqa: E402
from benchkit.sweep import rundir  # noqa: E402
from benchkit.sweep.plan import load_plan  # noqa: E402
from fits import fit_branches  # noqa: E402
from instruments.clock import VirtualClock  # noqa: E402

PARTS = load_catalogue()
SAMPLE = {"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1}   # 10 uF, 6.3 V
TRUTH = LandauTruth(C0_F=9.6e-6, V_k_V=2.5)                           # invented, in tolerance
FIT_TOL_PCT_OF_C0 = 0.5
VISA_SIM = Path(__file__).resolve().parents[1] / "drivers" / "visa_sim"


def toml(s: str) -> str:
    return json.dumps(s)


def plan(tmp_path, **bias):
    b = {"start_V": 0.0, "stop_V": 6.0, "step_V": 1.0}
    b.update(bias)
    return load_plan(write_plan(tmp_path / "plan.toml", samples=[SAMPLE], bias=b,
                                measure={"dwell_s": 1.0, "n_readings": 2}), PARTS)


def bench_file(tmp_path, sim, meter_resource, meter_profile, supply=True, extra="") -> Path:
    """A bench file: our meter, the simulated bench for the rest."""
    res = sim.resources
    lines = [extra, "[instrument.meter]", f"resource = {toml(meter_resource)}",
             f"profile = {toml(str(meter_profile))}", ""]
    roles = ("supply", "scanner", "thermometer") if supply else ("scanner", "thermometer")
    for role in roles:
        lines += [f"[instrument.{role}]", f"resource = {toml(res[role])}", ""]
    lines += ["[[channel]]", "channel = 1", 'sample_id = "FX-01"', 'part_id = "BD-1001"']
    p = tmp_path / "bench.toml"
    p.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return p


def independent_run(tmp_path, layout, reply_table):
    prof = tmp_path / "meter.toml"
    prof.write_text(PROFILE_HEAD + reply_table, encoding="utf-8")
    clock = VirtualClock()
    with demo_bench(clock=clock) as sim:
        meter = IndependentMeter(TRUTH, lambda: sim.part_voltage_V(1), layout=layout)
        with MeterServer(meter) as srv:
            bf = bench_file(tmp_path, sim, srv.resource, prof)
            result = run_sweep(bf, plan(tmp_path), tmp_path / "run", clock, parts=PARTS,
                               handle_signals=False)
        return result, sim.supply_state()


def fit_error_pct(run_dir) -> float:
    data = rundir.read_run_dir(run_dir)
    (s,) = data.samples.values()
    out = fit_branches(s.bias_V, s.C_F, s.branch, s.sigma_F, model="auto")
    worst = 0.0
    for curve in out.curves.values():
        lo, hi = curve.valid_range_V
        V = np.linspace(lo, hi, 61)
        truth = np.array([TRUTH.C_F(v) for v in V]) / (1 + TRUTH.D ** 2)   # Cp of the truth
        worst = max(worst, float(np.max(np.abs(curve.C(V) - truth)) / TRUTH.C0_F * 100))
    return worst


@pytest.mark.parametrize("layout, reply", [("C,D,status", REPLY_STATUS), ("D,C", REPLY_D_FIRST)])
def test_independent_meter_by_profile_alone_fits_its_truth(tmp_path, layout, reply):
    result, state = independent_run(tmp_path, layout, reply)
    assert result.status == "complete", result.reason
    assert state["output_on"] is False and state["set_V"] == 0.0
    assert fit_error_pct(tmp_path / "run") <= FIT_TOL_PCT_OF_C0
    rows = read_rows(tmp_path / "run")
    assert all(abs(float(r["C_F"]) - TRUTH.C_F(float(r["bias_meas_V"])) / (1 + TRUTH.D ** 2))
               < 0.01 * TRUTH.C0_F for r in rows)
    # the independent meter measures the level across the part: 10 uF behind 100 ohm at
    # 1 Vrms sees about 0.17 Vrms, outside 1.0 +-0.2: flagged, and the curve says so
    assert all("level_off_standard" in r["flags"] for r in rows)
    cond = rundir.fit_conditions(read_meta(tmp_path / "run"), rows)
    assert 0.1 < cond["ac_level_Vrms"] < 0.25 and "across the part" in cond["ac_level_source"]


def test_swapped_fields_stop_the_run_at_the_first_point_with_the_bias_off(tmp_path):
    result, state = independent_run(tmp_path, "D,C", "")   # the profile keeps <C>,<D>
    assert result.status == "aborted"
    assert result.n_points == 0 and read_rows(tmp_path / "run") == []
    assert "another order" in result.reason and "[measure.reply]" in result.reason
    assert "BD-1001" in result.reason
    assert state == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
    assert result.supply_safe


def test_a_meter_without_level_monitor_says_so_and_the_curve_states_the_set_level(tmp_path):
    prof = tmp_path / "meter.toml"
    prof.write_text(PROFILE_HEAD[:PROFILE_HEAD.index("[setting.ac_dut_Vrms]")] + REPLY_STATUS,
                    encoding="utf-8")
    clock = VirtualClock()
    with demo_bench(clock=clock) as sim:
        meter = IndependentMeter(TRUTH, lambda: sim.part_voltage_V(1))
        with MeterServer(meter) as srv:
            result = run_sweep(bench_file(tmp_path, sim, srv.resource, prof),
                               plan(tmp_path, stop_V=2.0), tmp_path / "run", clock, parts=PARTS,
                               handle_signals=False)
    assert result.status == "complete", result.reason
    meta = read_meta(tmp_path / "run")
    assert meta["meter_capabilities"]["level_monitor"].startswith("not used")
    rows = read_rows(tmp_path / "run")
    assert all(r["ac_level_dut_Vrms"] == "" and "level_off_standard" not in r["flags"] for r in rows)
    cond = rundir.fit_conditions(meta, rows)
    assert cond["ac_level_Vrms"] == 1.0 and cond["ac_level_source"].startswith("set level")


def test_sweep_through_pyvisa_sim_gpib_meter_and_usb_supply(tmp_path):
    pytest.importorskip("pyvisa_sim")
    lib = f"{VISA_SIM / 'bench.yaml'}@sim"
    clock = VirtualClock()
    with demo_bench(clock=clock) as sim:
        res = sim.resources
        text = "\n".join([
            f"visa_library = {toml(lib)}", "",
            "[instrument.meter]", 'resource = "GPIB0::17::INSTR"',
            f"profile = {toml(str(VISA_SIM / 'meter.toml'))}", "",
            "[instrument.supply]", 'resource = "USB0::0x1234::0x5678::U0001::INSTR"',
            f"profile = {toml(str(VISA_SIM / 'supply.toml'))}", "",
            "[instrument.scanner]", f"resource = {toml(res['scanner'])}", 'visa_library = "@py"', "",
            "[instrument.thermometer]", f"resource = {toml(res['thermometer'])}",
            'visa_library = "@py"', "",
            "[[channel]]", "channel = 1", 'sample_id = "FX-01"', 'part_id = "BD-1001"', ""])
        bf = tmp_path / "bench.toml"
        bf.write_text(text, encoding="utf-8")
        result = run_sweep(bf, plan(tmp_path, stop_V=2.0), tmp_path / "run", clock, parts=PARTS,
                           handle_signals=False)
    assert result.status == "complete", result.reason
    assert result.supply_safe        # OUTPut? read back 0 and SOURce:VOLTage? 0 V
    rows = read_rows(tmp_path / "run")
    assert all(r["function"] == "CSD" and float(r["C_F"]) == 1.0e-5 and float(r["D"]) == 0.015
               for r in rows)                                # <D>,<C>,<status> read as declared
    meta = read_meta(tmp_path / "run")
    assert meta["bench"]["visa_library"] == lib
    assert meta["instruments"]["meter"]["idn"].startswith("Brackwater Dynamics,BD-LCR-Y")
    # the fixed-reply supply reads 0 V back whatever it is set to: nonzero points say so
    assert ["bias_readback" in r["flags"] for r in rows] == [float(r["bias_set_V"]) != 0 for r in rows]


def test_a_bench_without_supply_needs_a_meter_with_internal_bias(tmp_path):
    from benchkit.errors import UserError
    from benchkit.sweep.benchfile import load_bench

    with demo_bench(clock=VirtualClock()) as sim:
        bf = bench_file(tmp_path, sim, sim.resources["meter"], "generic-lcr", supply=False)
        with pytest.raises(UserError, match="missing table \\[instrument.supply\\].*internal bias"):
            load_bench(bf)
