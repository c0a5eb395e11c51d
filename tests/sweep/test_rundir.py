"""benchkit.sweep.rundir: the one reader of run directories for `benchkit fit`, the library and verify.

Run directories are written here with the csv module in the run-directory layout of DEVELOPERS.md,
independently of benchkit's own run writer. All parts and numbers are invented for the tests
(Brackwater Dynamics demo part BD-1001).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
from pathlib import Path

import numpy as np
import pytest

from benchkit.sweep import rundir, runlog
from benchkit.errors import UserError

# DEVELOPERS.md, "File formats": run directory, written out here rather than taken from benchkit
COLUMNS = (
    "run_id,sample_id,part_id,channel,step_index,branch,repeat,bias_set_V,bias_meas_V,"
    "bias_current_A,function,freq_Hz,ac_level_set_Vrms,ac_level_dut_Vrms,C_F,C_std_F,D,Rs_ohm,"
    "n_readings,temp_C,t_s,dwell_s,settle_s,drift_pct_per_s,flags,utc"
).split(",")
V_STEPS = np.linspace(0.0, 6.0, 13)


def tanh_C(V):
    """Invented truth: C_inf + (C_pk - C_inf) sech^2(V/V0), C_inf 1.5 uF, C_pk 10 uF, V0 2.5 V."""
    return 1.5e-6 + 8.5e-6 / np.cosh(np.asarray(V) / 2.5) ** 2


def make_points(sample_id="FX-01", *, seed=0, both=True, n_readings=4, rel_noise=0.002):
    rng = np.random.default_rng(seed)
    steps = [("rising", v) for v in V_STEPS]
    if both:
        steps += [("falling", v) for v in V_STEPS[::-1][1:]]
    out = []
    for i, (branch, v) in enumerate(steps):
        c = float(tanh_C(v)) * (1.0 + rel_noise * rng.standard_normal())
        out.append({"sample_id": sample_id, "step_index": i, "branch": branch, "bias_set_V": float(v),
                    "C_F": c, "C_std_F": 2.0 * rel_noise * c, "n_readings": n_readings, "flags": ""})
    return out


def csv_text(points) -> str:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=COLUMNS, lineterminator="\n")
    w.writeheader()
    for p in points:
        w.writerow({
            "run_id": "RUN-RD-1", "sample_id": p["sample_id"], "part_id": p.get("part_id", "BD-1001"),
            "channel": 1, "step_index": p["step_index"], "branch": p["branch"], "repeat": 0,
            "bias_set_V": repr(p["bias_set_V"]), "bias_meas_V": repr(p["bias_set_V"]),
            "bias_current_A": "1e-09", "function": "CPD", "freq_Hz": p.get("freq_Hz", "1000.0"),
            "ac_level_set_Vrms": "1.0", "ac_level_dut_Vrms": "0.5",
            "C_F": p["C_F"] if isinstance(p["C_F"], str) else repr(p["C_F"]),
            "C_std_F": "" if p["C_std_F"] is None else repr(p["C_std_F"]), "D": "0.02",
            "Rs_ohm": "0.02", "n_readings": p["n_readings"], "temp_C": p.get("temp_C", 25.0),
            "t_s": float(p["step_index"]), "dwell_s": 1.0, "settle_s": 0.5, "drift_pct_per_s": "",
            "flags": p["flags"], "utc": "2026-01-01T00:00:00.000Z"})
    return buf.getvalue()


def write_run(run_dir: Path, points, *, status="complete", tail: bytes = b"",
              conditions=None) -> Path:
    """run.json + points.csv; a complete run carries the sha256 of its points (hashlib)."""
    run_dir.mkdir(parents=True)
    data = csv_text(points).encode("utf-8") + tail
    (run_dir / "points.csv").write_bytes(data)
    meta = {"format": "benchkit-run", "version": 1, "run_id": "RUN-RD-1", "software_version": "test",
            "status": status, "reason": None if status == "complete" else "stopped by the test",
            "start_utc": "2026-01-01T00:00:00Z", "end_utc": "2026-01-01T01:00:00Z", "clock": "virtual",
            "plan": {}, "instruments": {}, "samples": [],
            "conditions": conditions or {"function": "CPD", "freq_Hz": 1000.0, "ac_level_Vrms": 1.0,
                                         "conditions_source": "test"},
            "points_file": "points.csv",
            "points_sha256": hashlib.sha256(data).hexdigest() if status == "complete" else None,
            "events": []}
    (run_dir / "run.json").write_text(json.dumps(meta, indent=1), encoding="utf-8")
    return run_dir


def test_left_out_flags_are_words_of_the_flag_vocabulary():
    # the team rule: overload, current_limit and bias_readback points are left out of every fit
    assert rundir.LEFT_OUT_FLAGS == {"overload", "current_limit", "bias_readback"}
    assert rundir.LEFT_OUT_FLAGS <= runlog.FLAGS.keys()


def test_partial_last_line_of_an_aborted_run_is_dropped(tmp_path):
    pts = make_points(both=False)
    # the point in progress when the run stopped: half a row, no line end (benchkit.sweep.runlog
    # fsyncs each whole row, so only the last line of a stopped run can be partial)
    partial = csv_text([dict(pts[0], step_index=99)]).splitlines()[1][:40].encode()
    run = write_run(tmp_path / "run", pts, status="aborted", tail=partial)
    data = rundir.read_run_dir(run)
    s = data.samples["FX-01"]
    assert s.n_points == len(pts) and data.left_out == 0
    assert s.lines == tuple(range(2, 2 + len(pts)))  # header is line 1
    np.testing.assert_array_equal(s.bias_V, V_STEPS)
    assert data.points_sha256 == hashlib.sha256((run / "points.csv").read_bytes()).hexdigest()


@pytest.mark.parametrize("flag", sorted(rundir.LEFT_OUT_FLAGS))
def test_a_flagged_point_is_left_out_and_counted(tmp_path, flag):
    pts = make_points()
    # common practice: at a limited or mis-read bias, or an overrange reading, the point is no
    # sample of C(bias_set_V); a wrong reading the fit must not see
    pts[4] = dict(pts[4], flags=f"retried;{flag}", C_F=pts[4]["C_F"] * 1.3)
    pts[6] = dict(pts[6], flags="temp_change")  # a flag that does not leave the point out
    data = rundir.read_run_dir(write_run(tmp_path / "run", pts))
    s = data.samples["FX-01"]
    # + 1: the top reading counts in the falling branch too (the loop's turning point)
    assert data.left_out == s.left_out == 1 and s.n_points == len(pts) - 1 + 1
    assert s.left_out_lines == (6,) and s.left_out_rows[0]["flags"] == f"retried;{flag}"
    assert pts[4]["C_F"] not in s.C_F and pts[6]["C_F"] in s.C_F
    assert data.left_out_flags == rundir.LEFT_OUT_FLAGS
    rising = s.select("rising")
    assert rising.n_points == len(V_STEPS) - 1 and rising.left_out == 1
    assert s.select("falling").left_out == 0 and s.branches() == ["rising", "falling"]


def test_the_turning_point_belongs_to_both_branches(tmp_path):
    # common practice: the legs of a hysteresis loop meet at its turning point; the falling
    # leg starts from the state read at the top, so a falling curve covers the swept range
    pts = make_points()
    data = rundir.read_run_dir(write_run(tmp_path / "run", pts))
    s = data.samples["FX-01"]
    top = float(V_STEPS[-1])
    falling = s.select("falling")
    assert float(falling.bias_V.max()) == top and falling.n_points == len(V_STEPS)
    assert falling.turning.sum() == 1 and float(falling.bias_V[falling.turning][0]) == top
    i_top = next(i for i, p in enumerate(pts) if p["bias_set_V"] == top)
    assert float(falling.C_F[falling.turning][0]) == pts[i_top]["C_F"]
    assert falling.lines[int(np.flatnonzero(falling.turning)[0])] == i_top + 2  # same points.csv line
    rising = s.select("rising")
    assert rising.n_points == len(V_STEPS) and not rising.turning.any()
    from fits import fit_branches
    out = fit_branches(s.bias_V, s.C_F, s.branch, s.sigma_F)
    assert out.curves["falling"].valid_range_V == (0.0, top) == out.curves["rising"].valid_range_V


def test_a_falling_branch_that_reaches_the_top_gets_no_copy(tmp_path):
    pts = make_points()
    pts.append(dict(pts[len(V_STEPS) - 1], step_index=len(pts), branch="falling"))
    s = rundir.read_run_dir(write_run(tmp_path / "run", pts)).samples["FX-01"]
    assert not s.turning.any() and s.n_points == len(pts)


def test_a_flagged_top_reading_is_not_copied(tmp_path):
    pts = make_points()
    i_top = len(V_STEPS) - 1
    pts[i_top] = dict(pts[i_top], flags="overload")
    s = rundir.read_run_dir(write_run(tmp_path / "run", pts)).samples["FX-01"]
    assert not s.turning.any() and s.left_out == 1


def test_extra_flags_leave_more_out(tmp_path):
    pts = make_points()
    pts[2] = dict(pts[2], flags="max_dwell")
    data = rundir.read_run_dir(write_run(tmp_path / "run", pts), extra_flags=["max_dwell"])
    assert data.left_out == 1 and "max_dwell" in data.left_out_flags


def test_every_consumer_leaves_the_same_points_out(tmp_path, capsys):
    """`benchkit fit`, `library add` and verify fit the same points (one reader)."""
    from benchkit.cli import main
    from benchkit.library import Library
    from benchkit.verify.measured import load_inputs
    from fits import Curve

    pts = make_points(both=False)
    for i, flag in zip((3, 6, 9), sorted(rundir.LEFT_OUT_FLAGS)):
        pts[i] = dict(pts[i], flags=flag, C_F=pts[i]["C_F"] * 1.3)
    run = write_run(tmp_path / "run", pts)
    kept = len(pts) - 3

    assert main(["fit", str(run), "--out", str(tmp_path / "c.json"), "--model", "tanh"]) == 0
    assert "3 point(s) left out" in capsys.readouterr().err  # notes go to stderr
    assert Curve.load(tmp_path / "c.json").stats["n_points"] == kept

    part = {"id": "BD-1001", "description": "10 uF 6.3 V X5R 0402", "nominal_C_F": 10e-6,
            "tolerance": "M", "rated_V": 6.3, "class_code": "X5R", "case": "0402",
            "supplier": "invented supplier A"}
    with Library(tmp_path / "lib.sqlite") as lib:
        lib.add_parts([part])
        [fc] = lib.add_run(run, "BD-1001", model="tanh").curves
    assert fc.n_points == kept and fc.curve.stats["n_points"] == kept

    [sample], _ = load_inputs([run], "BD-1001", model="tanh")
    assert sample.points.bias_V.size == kept and sample.conditions["points_dropped"] == 3
    assert sample.curve.stats["n_points"] == kept


def test_sigma_is_C_std_over_sqrt_n(tmp_path):
    # JCGM 100:2008 4.2.3: the standard deviation of the mean of n readings is s/sqrt(n)
    pts = make_points(n_readings=5)
    pts[1] = dict(pts[1], n_readings=2)
    s = rundir.read_run_dir(write_run(tmp_path / "run", pts)).samples["FX-01"]
    s = s.select("rising")  # the readings once each (the top is copied to the falling branch)
    std = np.array([p["C_std_F"] for p in pts if p["branch"] == "rising"])
    n = np.array([p["n_readings"] for p in pts if p["branch"] == "rising"], dtype=float)
    np.testing.assert_allclose(s.sigma_F, std / np.sqrt(n), rtol=1e-15)
    np.testing.assert_array_equal(s.n_readings, n)


@pytest.mark.parametrize("change", [dict(C_std_F=None), dict(n_readings=0), dict(C_std_F=0.0)])
def test_no_sigma_unless_every_point_has_one(tmp_path, change):
    # without a usable C_std_F/sqrt(n) at every point the fit weighs from repeated biases
    pts = make_points()
    pts[3] = dict(pts[3], **change)
    s = rundir.read_run_dir(write_run(tmp_path / "run", pts)).samples["FX-01"]
    assert s.sigma_F is None
    assert s.select("falling").sigma_F is not None  # the other branch has it everywhere


def test_points_changed_after_the_run_ended_are_refused(tmp_path):
    run = write_run(tmp_path / "run", make_points())
    path = run / "points.csv"
    text = path.read_text()
    path.write_text(text.replace(",CPD,", ",CSD,", 1))  # still well formed, one field changed
    with pytest.raises(UserError, match="sha256 differs from the one in run.json") as exc:
        rundir.read_run_dir(run)
    assert str(exc.value).startswith(f"{path}: ") and str(exc.value).endswith("not fitted")
    with pytest.raises(UserError, match="so they are not added$"):
        rundir.read_run_dir(run, action="added")
    path.write_text(text)  # the bytes run.json was sealed with: accepted again
    assert rundir.read_run_dir(run).samples["FX-01"].n_points == len(make_points()) + 1  # top in both branches


@pytest.mark.parametrize("change, words", [
    (dict(C_F="abc"), "line 5: column 'C_F': 'abc' is not a number"),
    (dict(C_F=""), "line 5: column 'C_F' is empty"),
    (dict(C_F=-1e-6), "line 5: C_F = -1e-06 is not a positive capacitance"),
    (dict(branch="sideways"), "line 5: column 'branch': 'sideways' is not 'rising' or 'falling'"),
    (dict(n_readings="four"), "line 5: column 'n_readings': 'four' is not a number"),
])
def test_bad_points_give_one_line_naming_file_and_line(tmp_path, change, words):
    pts = make_points()
    pts[3] = dict(pts[3], **change)
    run = write_run(tmp_path / "run", pts)
    with pytest.raises(UserError) as exc:
        rundir.read_run_dir(run)
    msg = str(exc.value)
    assert msg.startswith(f"{run / 'points.csv'}: ") and words in msg and "\n" not in msg


def test_a_bad_field_in_a_left_out_point_is_not_read(tmp_path):
    # an overloaded point may carry no C_F at all (every reading overrange)
    pts = make_points()
    pts[3] = dict(pts[3], C_F="", C_std_F=None, n_readings=0, flags="overload")
    data = rundir.read_run_dir(write_run(tmp_path / "run", pts))
    assert data.left_out == 1


def test_everything_left_out_and_the_sample_selection(tmp_path):
    pts = [dict(p, flags="overload") for p in make_points()]
    with pytest.raises(UserError, match="every point of the selection carries an excluded flag"):
        rundir.read_run_dir(write_run(tmp_path / "a", pts))
    two = make_points("FX-01") + make_points("FX-02", seed=1)
    run = write_run(tmp_path / "b", two)
    assert list(rundir.read_run_dir(run).samples) == ["FX-01", "FX-02"]
    assert list(rundir.read_run_dir(run, sample="FX-02").samples) == ["FX-02"]
    with pytest.raises(UserError, match=r"--sample FX-09: not in .*samples: FX-01, FX-02"):
        rundir.read_run_dir(run, sample="FX-09")


def test_fit_conditions_from_the_points_else_run_json(tmp_path):
    pts = make_points(both=False)
    for i, p in enumerate(pts):
        p["temp_C"] = 25.0 + 0.1 * i
    s = rundir.read_run_dir(write_run(tmp_path / "a", pts)).samples["FX-01"]
    c = rundir.fit_conditions({"conditions": {}}, s.rows)
    # median of the points' frequency and of the level across the part (what the part saw, not
    # the set level), mean of their temperatures (numpy)
    dut = float(np.median([float(r["ac_level_dut_Vrms"]) for r in s.rows]))
    assert c == {"freq_Hz": 1000.0, "ac_level_Vrms": dut,
                 "ac_level_source": "level across the part (median of the points)",
                 "temp_C": pytest.approx(float(np.mean([p["temp_C"] for p in pts]))), "function": "CPD"}
    # (a run without a level monitor falls back to the set level: test_meter_profiles.py)
    no_freq = [dict(p, freq_Hz="") for p in make_points(both=False)]
    run = write_run(tmp_path / "b", no_freq, conditions={"function": "CPD", "freq_Hz": 120.0,
                                                         "ac_level_Vrms": 0.5})
    data = rundir.read_run_dir(run)
    assert rundir.fit_conditions(data.meta, data.samples["FX-01"].rows)["freq_Hz"] == 120.0
