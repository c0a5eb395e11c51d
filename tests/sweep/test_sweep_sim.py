"""Sweeps on the simulated bench through pyvisa-py over loopback TCP, on a virtual clock."""

import hashlib
import math
from datetime import datetime

import pytest

from benchkit.sweep.plan import load_plan
from benchkit.sweep.runlog import COLUMNS
from benchkit.catalogue import load_catalogue
from benchkit.sweep import resume_sweep, run_sweep
from instruments.clock import VirtualClock
from instruments.sim import Fault, SimBench
from benchkit.catalogue.codes import tolerance_limits_F

from sweep_helpers import CtrlCAfter, flags_besides_level, read_meta, read_rows, write_plan
from benchkit.commands.sim import demo_bench

PARTS = load_catalogue()
SAMPLES = [  # demo fixture channels 1, 3, 4: two 6.3 V 10 uF parts and a 25 V 1 uF part
    {"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1},
    {"sample_id": "FX-03", "part_id": "BD-1003", "channel": 3},
    {"sample_id": "FX-04", "part_id": "BD-1004", "channel": 4},
]
BIASES = [0.0, 2.0, 4.0, 6.0, 4.0, 2.0, 0.0]
BRANCHES = ["rising"] * 4 + ["falling"] * 3


@pytest.fixture(scope="module")
def swept(tmp_path_factory):
    """One rising-then-falling sweep of three samples; the bench stays up for its oracles."""
    tmp = tmp_path_factory.mktemp("sweep")
    plan = load_plan(write_plan(tmp / "plan.toml", samples=SAMPLES,
                                bias={"stop_V": 6.0, "step_V": 2.0}), PARTS)
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        result = run_sweep(bench, plan, tmp / "run", clock, parts=PARTS)
        yield result, read_rows(tmp / "run"), read_meta(tmp / "run"), bench


def test_rows_in_plan_order_once_each(swept):
    result, rows, meta, _ = swept
    assert result.status == "complete" and result.exit_code == 0
    assert len(rows) == result.n_points == 3 * len(BIASES)
    expect = [(s["sample_id"], i, BRANCHES[i], BIASES[i]) for s in SAMPLES for i in range(len(BIASES))]
    got = [(r["sample_id"], int(r["step_index"]), r["branch"], float(r["bias_set_V"])) for r in rows]
    assert got == expect
    assert all(list(r) == list(COLUMNS) for r in rows)  # the contract's columns, in order


def test_units_and_readbacks(swept):
    _, rows, _, _ = swept
    for r in rows:
        part = PARTS[r["part_id"]]
        assert abs(float(r["bias_meas_V"]) - float(r["bias_set_V"])) <= 0.05  # volts, not mV
        assert r["freq_Hz"] == "1000.0" and r["ac_level_set_Vrms"] == "1.0"
        assert int(r["n_readings"]) == 2 and float(r["C_std_F"]) >= 0
        assert float(r["dwell_s"]) == 1.0 and float(r["settle_s"]) == 1.0
        assert 20.0 < float(r["temp_C"]) < 30.0  # degC at the fixture, chamber at 25
        assert flags_besides_level(r, part.nominal_C_F) == ""
        datetime.fromisoformat(r["utc"].replace("Z", "+00:00"))
        if float(r["bias_set_V"]) == 0.0 and r["branch"] == "rising":
            # at 0 V a part reads within its tolerance letter [standard: IEC 60062]: C_F is in farads
            lo, hi = tolerance_limits_F(part.nominal_C_F, part.tolerance)
            assert lo <= float(r["C_F"]) <= hi
    t = [float(r["t_s"]) for r in rows]
    assert t == sorted(t) and t[0] >= 1.0  # clock seconds since start, after the first dwell


def test_ac_level_across_the_part(swept):
    # V_dut = V_osc*|Zx|/|R_src + Zx| with R_src = 100 ohm [published: LCR meter manuals;
    # source resistance from instruments/COMMANDS.md]; Zx from the logged Cs and Rs.
    _, rows, _, _ = swept
    for r in rows:
        w = 2 * math.pi * float(r["freq_Hz"])
        Zx = float(r["Rs_ohm"]) + 1 / (1j * w * float(r["C_F"]))
        expect = float(r["ac_level_set_Vrms"]) * abs(Zx) / abs(100.0 + Zx)
        assert float(r["ac_level_dut_Vrms"]) == pytest.approx(expect, rel=0.02)


def test_class2_loses_capacitance_under_bias(swept):
    # [common practice]: class-2 parts lose capacitance with DC bias (science notes section 5)
    _, rows, _, _ = swept
    for s in SAMPLES:
        rising = [float(r["C_F"]) for r in rows if r["sample_id"] == s["sample_id"] and r["branch"] == "rising"]
        assert rising == sorted(rising, reverse=True)


def test_falling_branch_reads_lower_than_rising(swept):
    # [published: S. L. Miller et al., J. Appl. Phys. 68, 6463 (1990)]: the rising branch's C
    # peaks at +Ec, the falling one at -Ec, so at a positive bias the falling branch reads lower.
    _, rows, _, _ = swept
    for s in SAMPLES:
        by = {(r["branch"], float(r["bias_set_V"])): float(r["C_F"]) for r in rows if r["sample_id"] == s["sample_id"]}
        for v in (2.0, 4.0):
            assert by[("falling", v)] < by[("rising", v)] * (1 - 5e-3)  # well above 1e-4 noise


def test_readings_match_the_simulated_truth(swept):
    # plumbing check against the bench's own noise-free settled value at 0 V before any bias
    # (channel -> part mapping, conditions reached the meter). The bench's truth is Cp;
    # Cp = Cs/(1 + D^2) [published: impedance-measurement handbook relations].
    _, rows, _, bench = swept
    firsts = [r for r in rows if r["step_index"] == "0"]
    assert len(firsts) == len(SAMPLES)
    for r in firsts:
        C, D = float(r["C_F"]), float(r["D"])
        Cp = C if r["function"] == "CPD" else C / (1 + D * D)
        truth = bench.true_settled_C_F(int(r["channel"]), 0.0, "rising", freq_Hz=float(r["freq_Hz"]),
                                       ac_level_Vrms=float(r["ac_level_set_Vrms"]))
        assert Cp == pytest.approx(truth, rel=0.02)


def test_run_json_describes_the_run(swept, tmp_path_factory):
    result, rows, meta, bench = swept
    assert meta["format"] == "benchkit-run" and meta["version"] == 1
    assert meta["status"] == "complete" and meta["reason"] is None and meta["end_utc"]
    assert meta["clock"] == "virtual" and meta["run_id"] == rows[0]["run_id"] == result.run_id
    sha = hashlib.sha256((result.run_dir / "points.csv").read_bytes()).hexdigest()
    assert meta["points_sha256"] == sha == result.points_sha256
    assert set(meta["instruments"]) == {"meter", "supply", "scanner", "thermometer", "chamber"}
    assert all(i["idn"].startswith("benchkit-sim,") for i in meta["instruments"].values())
    assert [s["sample_id"] for s in meta["samples"]] == [s["sample_id"] for s in SAMPLES]
    assert meta["samples"][0]["part"]["rated_V"] == 6.3 and "sim" not in meta["samples"][0]["part"]
    c = meta["conditions"]  # all three parts are class 2 <= 10 uF: one set of conditions
    assert (c["freq_Hz"], c["ac_level_Vrms"]) == (1e3, 1.0)
    assert "IEC 60384-1 clause 4.2.2" in c["conditions_source"]
    assert meta["plan"]["bias"]["stop_V"] == 6.0 and len(meta["plan_sha256"]) == 64
    kinds = [e["event"] for e in meta["events"]]
    assert kinds[0] == "start" and kinds[-1] == "complete" and "output_off" in kinds


def test_supply_left_at_zero_and_off(swept):
    _, _, meta, bench = swept
    st = bench.supply_state()  # the simulated supply's real state (test oracle)
    assert st["output_on"] is False and st["set_V"] == 0.0
    assert meta["sim_final_supply_state"]["output_on"] is False


def _one_sample_plan(tmp_path, **kw):
    return load_plan(write_plan(tmp_path / "plan.toml", samples=SAMPLES[:1], **kw), PARTS)


def test_current_limit_is_flagged(tmp_path):
    plan = _one_sample_plan(tmp_path)
    clock = VirtualClock()
    # the supply's limit drops to 1e-7 A: charging current is capped, the terminal voltage sags
    with demo_bench(clock=clock, faults=[Fault.parse("current-limit:after=0:limit=1e-7")]) as bench:
        res = run_sweep(bench, plan, tmp_path / "run", clock, parts=PARTS)
        assert bench.supply_state()["output_on"] is False
    rows = read_rows(tmp_path / "run")
    assert res.status == "complete"
    limited = [r for r in rows if float(r["bias_set_V"]) > 0 and r["branch"] == "rising"]
    assert limited and all("current_limit" in r["flags"].split(";") for r in limited)
    assert all("bias_readback" in r["flags"].split(";") for r in limited)


def test_instrument_error_aborts_safely_and_resume_completes(tmp_path):
    plan = load_plan(write_plan(tmp_path / "plan.toml", samples=SAMPLES[:2]), PARTS)
    clock = VirtualClock()
    # an error left in the meter's queue: the error check after the point in progress fails,
    # so that point is not written (errors are read after each point, not once per sample)
    with demo_bench(clock=clock, faults=[Fault.parse("error:after=20")]) as bench:
        res = run_sweep(bench, plan, tmp_path / "run", clock, parts=PARTS)
        assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
        meta = read_meta(tmp_path / "run")
        assert res.status == "aborted" and res.exit_code == 1 and res.supply_safe
        assert meta["status"] == "aborted" and "InstrumentError" in meta["reason"]
        n_before = len(read_rows(tmp_path / "run"))
        assert 0 < n_before < res.n_planned
        res2 = resume_sweep(tmp_path / "run", bench, clock)
    rows = read_rows(tmp_path / "run")
    assert res2.status == "complete" and res2.n_points == res.n_planned == len(rows)
    keys = [(r["sample_id"], r["repeat"], r["step_index"]) for r in rows]
    assert len(set(keys)) == len(keys)  # no duplicates, and with the count: no gaps
    first = rows[n_before]  # the point the error arrived at, measured again after the resume
    assert (first["step_index"] == "0") != ("resumed" in first["flags"].split(";"))
    assert read_meta(tmp_path / "run")["status"] == "complete"


def test_sigint_mid_sample_then_resume_approaches_from_above(tmp_path):
    plan = _one_sample_plan(tmp_path)
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, plan, tmp_path / "run", clock, CtrlCAfter(3), parts=PARTS)
        assert res.status == "aborted" and res.reason.startswith("SIGINT")
        assert bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
        assert len(read_rows(tmp_path / "run")) == 3  # 0, 2, 4 V rising: every completed point
        res2 = resume_sweep(tmp_path / "run", bench, clock)
        assert bench.supply_state()["output_on"] is False
    rows = read_rows(tmp_path / "run")
    assert res2.status == "complete"
    assert [(r["branch"], float(r["bias_set_V"])) for r in rows] == [
        ("rising", 0.0), ("rising", 2.0), ("rising", 4.0), ("falling", 2.0), ("falling", 0.0)]
    nominal = PARTS[rows[3]["part_id"]].nominal_C_F
    assert flags_besides_level(rows[3], nominal) == "resumed"
    assert all(flags_besides_level(r, nominal) == "" for r in rows[4:])
    events = [e for e in read_meta(tmp_path / "run")["events"] if e["event"] == "resume_approach"]
    assert events and events[0]["via_V"] == 4.0  # the falling point is reached from the peak


def test_overload_reading_left_out_and_flagged(tmp_path):
    plan = _one_sample_plan(tmp_path, bias={"stop_V": 2.0, "step_V": 2.0}, measure={"n_readings": 3})
    clock = VirtualClock()
    with demo_bench(clock=clock, faults=[Fault.parse("overload:after=25")]) as bench:
        res = run_sweep(bench, plan, tmp_path / "run", clock, parts=PARTS)
    rows = read_rows(tmp_path / "run")
    over = [r for r in rows if "overload" in r["flags"]]
    assert res.status == "complete" and len(over) == 1
    assert over[0]["n_readings"] == "2" and float(over[0]["C_F"]) > 0


def test_temperature_change_is_flagged(tmp_path):
    plan = _one_sample_plan(tmp_path)
    clock = VirtualClock()
    # the chamber drifts 30 degC per clock minute: beyond temp_tolerance_C = 2 after the first point
    with demo_bench(clock=clock, faults=[Fault.parse("temp-drift:after=0:rate=30")]) as bench:
        run_sweep(bench, plan, tmp_path / "run", clock, parts=PARTS)
    rows = read_rows(tmp_path / "run")
    t0 = float(rows[0]["temp_C"])
    for r in rows[1:]:
        moved = abs(float(r["temp_C"]) - t0) > 2.0
        assert ("temp_change" in r["flags"].split(";")) == moved
    assert any("temp_change" in r["flags"] for r in rows)
