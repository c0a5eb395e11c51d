"""Settle detection and adaptive steps inside the sweep engine, on the simulated bench
through pyvisa-py over loopback TCP, on a virtual clock."""

import math
import sys
from pathlib import Path

import pytest

from benchkit.sweep.adaptive import (
    MIN_PASS_GAIN, STOP_STALLED, AdaptiveSettings, LoopPlanner, measured_point,
)
from benchkit.errors import UserError
from benchkit.sweep.plan import parse_plan
from benchkit.sweep.runlog import FLAGS
from benchkit.catalogue import load_catalogue
from benchkit.sweep import resume_sweep, run_sweep
from instruments.clock import VirtualClock
from instruments.sim import Fault, SimBench

from bench_time_helpers import CtrlCAfter, read_meta, read_rows
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "sweep"))
from sweep_helpers import flags_besides_level  # noqa: E402
from benchkit.commands.sim import demo_bench

PARTS = load_catalogue()
LIMITS = {"current_limit_A": 0.01, "max_ramp_V_per_s": 5.0, "discharge_wait_s": 0.0}
SETTLE = {"max_drift_pct_per_s": 0.01, "max_dwell_s": 60.0, "min_dwell_s": 0.5}
ADAPTIVE = {"target_band_pct_of_C0": 0.5, "max_points": 40, "coarse_points": 7}
FX03 = {"sample_id": "FX-03", "part_id": "BD-1003", "channel": 3}  # 10 uF 6.3 V X7R
FX05 = {"sample_id": "FX-05", "part_id": "BD-1005", "channel": 5}  # 22 uF 10 V X5R


def plan(sample, bias, settle=None, adaptive=None, **measure):
    settle = {k: v for k, v in dict(SETTLE, **(settle or {})).items() if v is not None}
    raw = {"name": "t", "samples": [sample], "bias": bias,
           "measure": {"dwell": "settle", "n_readings": 3, **measure},
           "settle": settle, "limits": dict(LIMITS)}
    if adaptive is not None:
        raw["adaptive"] = adaptive
    return parse_plan(raw, "test plan")


def safe(bench):
    return bench.supply_state() == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}


def test_settle_rows_record_settle_time_and_final_drift(tmp_path):
    p = plan(FX03, {"start_V": 0.0, "stop_V": 4.0, "step_V": 2.0})
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, p, tmp_path / "run", clock, parts=PARTS, handle_signals=False)
        assert res.status == "complete" and safe(bench)
    rows = read_rows(tmp_path / "run")
    meta = read_meta(tmp_path / "run")
    assert meta["flags_vocabulary"]["max_dwell"] == FLAGS["max_dwell"]
    settle = [float(r["settle_s"]) for r in rows]
    assert all(0.5 <= s < 60.0 for s in settle)  # between min and max dwell
    assert len(set(settle)) > 1  # it watched the part: not one fixed time
    assert all(float(r["dwell_s"]) == 60.0 for r in rows)  # the longest it was allowed
    for r in rows:
        assert flags_besides_level(r, PARTS[r["part_id"]].nominal_C_F) == ""
        assert abs(float(r["drift_pct_per_s"])) <= 0.01
    # a step into the knee drifts longer than the step at 0 V (nothing to relax there)
    assert settle[0] < settle[1]


def test_instrument_that_never_settles_ends_each_point_at_max_dwell(tmp_path):
    # the chamber ramps by 60 degC per minute (temp-drift fault): an X7R part's C moves by
    # about 0.04 % per second with it (its tempco of ~1.5 % over 25..60 degC, from the demo
    # catalogue's EIA X7R curve), four times the threshold, for the whole sweep. At 0 V, so
    # no bias relaxation (of the other sign) can cancel it by chance.
    p = plan(FX03, {"points_V": [0.0], "branches": ["rising"], "repeats": 2},
             settle={"max_dwell_s": 8.0})
    clock = VirtualClock()
    with demo_bench(clock=clock, faults=[Fault.parse("temp-drift:after=0:rate=60")]) as bench:
        res = run_sweep(bench, p, tmp_path / "run", clock, parts=PARTS, handle_signals=False)
        assert res.status == "complete" and safe(bench)
    rows = read_rows(tmp_path / "run")
    assert len(rows) == 2
    for r in rows:
        assert "max_dwell" in r["flags"].split(";")
        assert 8.0 <= float(r["settle_s"]) <= 8.5
        assert abs(float(r["drift_pct_per_s"])) > 0.01


@pytest.fixture(scope="module")
def adaptive_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("adaptive")
    p = plan(FX05, {"points_V": [0.0, 10.0]}, adaptive=dict(ADAPTIVE))
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, p, tmp / "run", clock, parts=PARTS, handle_signals=False)
        ok = safe(bench)
    return res, read_rows(tmp / "run"), read_meta(tmp / "run"), ok


def test_adaptive_run_records_why_it_stopped(adaptive_run):
    res, rows, meta, ok = adaptive_run
    assert res.status == "complete" and ok and res.n_points == len(rows) == res.n_planned
    ad = meta["samples"][0]["adaptive"]
    assert ad["stop_reason"] in ("target met", "point budget reached", STOP_STALLED)
    assert ad["n_points"] == len(rows) <= ADAPTIVE["max_points"]
    passes = [e for e in meta["events"] if e["event"] == "adaptive_pass"]
    assert passes[-1]["stop_reason"] == ad["stop_reason"] and passes[-1]["points_V"] == []
    assert ad["passes"] == max(int(r["repeat"]) for r in rows) >= 2
    if ad["stop_reason"] == "target met":
        assert all(s["band_pct_of_C0"] <= 0.5 for s in ad["status"].values())
    if ad["stop_reason"] == STOP_STALLED:  # the last pass narrowed the worst band too little
        def worst(e):
            return max(s["band_pct_of_C0"] for s in e["status"].values())
        assert worst(passes[-1]) > (1 - MIN_PASS_GAIN) * worst(passes[-2]) > 0.5 * (1 - MIN_PASS_GAIN)


def test_adaptive_passes_are_monotonic_loops_that_turn_at_the_top(adaptive_run):
    _, rows, meta, _ = adaptive_run
    by_pass = {}
    for r in rows:
        by_pass.setdefault(int(r["repeat"]), []).append((r["branch"], float(r["bias_set_V"])))
    for k, pts in by_pass.items():
        rising = [v for b, v in pts if b == "rising"]
        falling = [v for b, v in pts if b == "falling"]
        assert rising == sorted(rising) and falling == sorted(falling, reverse=True)
        assert [b for b, _ in pts] == ["rising"] * len(rising) + ["falling"] * len(falling)
    assert max(v for b, v in by_pass[1] if b == "rising") == 10.0  # pass 1 reaches the top
    turns = [e for e in meta["events"] if e["event"] == "adaptive_turn"]
    later_falling = [k for k, pts in by_pass.items() if k >= 2 and any(b == "falling" for b, _ in pts)]
    assert sorted({e["pass_index"] for e in turns if e["bias_V"] == 10.0}) == later_falling
    steps = [int(r["step_index"]) for r in rows]
    assert steps == list(range(len(rows)))  # one row per planned point, in order


def test_adaptive_run_resumes_the_pass_it_was_in(tmp_path):
    # a target of 0.2 % makes pass 2 long enough (8 points) to be interrupted inside it; at
    # 0.5 % the leave-one-out choice of the fits meets the target after one extra point
    p = plan(FX05, {"points_V": [0.0, 10.0]},
             adaptive=dict(ADAPTIVE, target_band_pct_of_C0=0.2, coarse_spacing="even"))
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, p, tmp_path / "run", clock, CtrlCAfter(15), parts=PARTS)
        assert res.status == "aborted" and safe(bench)
        first = read_meta(tmp_path / "run")
        planned2 = next(e for e in first["events"] if e["event"] == "adaptive_pass" and e["pass"] == 2)
        assert len(read_rows(tmp_path / "run")) == 15 and len(planned2["points_V"]) > 2
        res2 = resume_sweep(tmp_path / "run", bench, clock)
        assert res2.status == "complete" and safe(bench)
    rows = read_rows(tmp_path / "run")
    keys = [(r["repeat"], r["step_index"]) for r in rows]
    assert len(set(keys)) == len(keys) == res2.n_points
    # the resumed session measured exactly the pass the first session had planned
    got2 = [[r["branch"], float(r["bias_set_V"])] for r in rows if r["repeat"] == "2"]
    assert got2 == planned2["points_V"]
    assert flags_besides_level(rows[15], PARTS[rows[15]["part_id"]].nominal_C_F) == "resumed"
    assert read_meta(tmp_path / "run")["samples"][0]["adaptive"]["stop_reason"]


def test_adaptive_run_resumes_inside_a_stepped_first_loop(tmp_path):
    # the stepped first loop is planned point by point from the points measured; a resume
    # feeds the rows on disk to a fresh planner and must measure the point that was next
    p = plan(FX03, {"points_V": [0.0, 6.0]}, adaptive=dict(ADAPTIVE))
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, p, tmp_path / "run", clock, CtrlCAfter(4), parts=PARTS)
        assert res.status == "aborted" and safe(bench)
        first = read_meta(tmp_path / "run")
        planned = [e for e in first["events"] if e["event"] == "adaptive_pass"]
        assert all(e["pass"] == 1 and e["open"] for e in planned)
        assert len(read_rows(tmp_path / "run")) == 4
        res2 = resume_sweep(tmp_path / "run", bench, clock)
        assert res2.status == "complete" and safe(bench)
    rows = read_rows(tmp_path / "run")
    # what the interrupted session would have measured next: a fresh planner fed its 4 rows
    planner = LoopPlanner(6.0, AdaptiveSettings.from_plan(ADAPTIVE))
    planner.first_pass()
    nxt = planner.next_pass([measured_point(r) for r in rows[:4]])
    assert nxt.index == 1 and [(rows[4]["branch"], float(rows[4]["bias_set_V"]))] == nxt.points
    assert flags_besides_level(rows[4], PARTS[rows[4]["part_id"]].nominal_C_F) == "resumed"
    assert [int(r["step_index"]) for r in rows] == list(range(len(rows)))
    one = [(r["branch"], float(r["bias_set_V"])) for r in rows if r["repeat"] == "1"]
    rising = [v for b, v in one if b == "rising"]
    assert rising[0] == 0.0 and rising[-1] == 6.0 and rising == sorted(set(rising))
    assert [v for b, v in one if b == "falling"] == rising[-2::-1]


def test_progress_total_counts_every_samples_stepped_loop_still_to_come(tmp_path):
    # two adaptive samples: the total the progress line counts to includes, at every point,
    # the first loop each sample will still plan at least (the even loop's 2*7 - 1 points for
    # one not begun), and never runs past what the run measured
    import io

    from benchkit.sweep.progress import Progress

    seen = []  # (points done, the total counted to) at every saved point

    class Totals(Progress):
        def point(self, done, text):
            super().point(done, text)
            seen.append((done, self.total))

    fx02 = {"sample_id": "FX-02", "part_id": "BD-1002", "channel": 2}
    p = parse_plan({"name": "t", "samples": [FX03, fx02], "bias": {"points_V": [0.0, 6.0]},
                    "measure": {"dwell": "settle", "n_readings": 3}, "settle": dict(SETTLE),
                    "limits": dict(LIMITS), "adaptive": dict(ADAPTIVE, target_band_pct_of_C0=5.0)},
                   "test plan")
    prog = Totals(stream=io.StringIO(), tty=False)
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, p, tmp_path / "run", clock, prog, parts=PARTS, handle_signals=False)
        assert res.status == "complete" and safe(bench)
    rows = read_rows(tmp_path / "run")
    n_first = sum(1 for r in rows if r["sample_id"] == "FX-03")
    assert 0 < n_first < len(rows)
    assert all(done <= total <= len(rows) for done, total in seen)
    # at the first sample's last point the second sample's whole first loop is still ahead
    assert dict(seen)[n_first] >= n_first + 13
    assert seen[-1] == (len(rows), len(rows))


@pytest.mark.parametrize("change, field", [
    ({"measure": {"dwell": "settle"}, "settle": None}, "'settle'"),
    ({"settle": {"max_drift_pct_per_s": 0.01}}, "settle.max_dwell_s"),
    ({"settle": {"max_drift_pct_per_s": 0.01, "max_dwell_s": 1.0, "min_dwell_s": 5.0}}, "settle.min_dwell_s"),
    ({"settle": {"max_drift_pct_per_s": 0.01, "max_dwell_s": 9, "wait": 1}}, "settle.wait"),
    ({"adaptive": {"max_points": 40}}, "adaptive.target_band_pct_of_C0"),
    ({"adaptive": {"target_band_pct_of_C0": 0.5, "max_points": 8}}, "adaptive.max_points"),
    ({"adaptive": {"target_band_pct_of_C0": 0.5, "model": "table"}}, "adaptive.model"),
    ({"adaptive": {"target_band_pct_of_C0": 0.5}, "bias": {"points_V": [0.0, 4.0], "polarity": "both"}}, "bias.polarity"),
    ({"adaptive": {"target_band_pct_of_C0": 0.5}, "bias": {"points_V": [0.0, 4.0], "repeats": 2}}, "bias.repeats"),
    ({"adaptive": {"target_band_pct_of_C0": 0.5}, "bias": {"points_V": [1.0, 4.0]}}, "'bias'"),
])
def test_bad_settle_or_adaptive_tables_are_refused_naming_the_field(change, field):
    raw = {"name": "t", "bias": {"points_V": [0.0, 4.0]},
           "measure": {"dwell": "settle", "n_readings": 3}, "settle": dict(SETTLE),
           "limits": dict(LIMITS)}
    for k, v in change.items():
        if v is None:
            raw.pop(k)
        elif isinstance(raw.get(k), dict) and k in ("measure", "bias"):
            raw[k] = dict(raw[k], **v)
        else:
            raw[k] = v
    with pytest.raises(UserError) as exc:
        parse_plan(raw, "plan.toml")
    assert str(exc.value).startswith("plan.toml: field ") and field in str(exc.value)


def test_fixed_dwell_plans_are_unchanged_by_the_new_tables():
    raw = {"name": "t", "bias": {"points_V": [0.0, 4.0]}, "measure": {"dwell_s": 1.0},
           "limits": dict(LIMITS)}
    p = parse_plan(raw, "plan.toml")
    assert p.settle is None and p.adaptive is None and "settle" not in p.data
    with pytest.raises(UserError, match="'settle': given but measure.dwell"):
        parse_plan(dict(raw, settle=dict(SETTLE)), "plan.toml")


def test_predicting_settle_records_the_predicted_settled_value_and_its_uncertainty(tmp_path):
    # the prediction rule (benchkit/sweep/settle.py): each row is the settled value read off
    # the relaxation fit of the dwell's readings; checked against the simulated part's own
    # noise-free settled curve (SimBench.true_settled_C_F), not against the detector
    p = plan(FX03, {"start_V": 0.0, "stop_V": 4.0, "step_V": 1.0},
             settle={"max_drift_pct_per_s": None, "max_prediction_u_pct_of_C0": 0.1,
                     "min_dwell_s": 1.0})
    clock = VirtualClock()
    with demo_bench(clock=clock) as bench:
        res = run_sweep(bench, p, tmp_path / "run", clock, parts=PARTS, handle_signals=False)
        assert res.status == "complete" and safe(bench)
        rows = read_rows(tmp_path / "run")
        assert rows
        for r in rows:
            assert "predicted" in r["flags"].split(";")
            n = int(r["n_readings"])
            assert n >= 5  # the readings of the fit are the point's readings
            u = float(r["C_std_F"]) / math.sqrt(n)
            falling = r["branch"] == "falling"  # after the turn at the top, 4 V
            truth = bench.true_settled_C_F(3, float(r["bias_set_V"]), r["branch"],
                                           turn_V=4.0 if falling else None,
                                           freq_Hz=float(r["freq_Hz"]),
                                           ac_level_Vrms=float(r["ac_level_set_Vrms"]),
                                           function=r["function"])
            assert abs(float(r["C_F"]) - truth) <= 3.0 * u, r
