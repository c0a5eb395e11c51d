"""Trust at the edges: limits bounded before anything is made, readers that cannot be made to
crash, and a resume that believes nothing in the run directory it cannot check.

The rule checked throughout [the project's safety rule, benchkit/errors.py]: bad input gets
one line (what, where, what to do), exit 2, and nothing is written or opened.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.sweep import runlog
from benchkit.sweep.benchfile import parse_bench_text
from benchkit.sweep.plan import load_plan
from benchkit.sweep.rundir import read_run_dir

from sweep_helpers import read_meta, read_rows, write_plan

SAMPLES = [{"sample_id": "FX-01", "part_id": "BD-1001", "channel": 1},   # 6.3 V part
           {"sample_id": "FX-04", "part_id": "BD-1004", "channel": 4}]


def one_line_exit_2(capsys, argv) -> str:
    code = main(argv)
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2, err
    assert len(lines) == 1 and lines[0].startswith("benchkit: error: "), err
    assert "\x1b" not in err and "\x00" not in err
    return lines[0]


def measure(plan: Path, out: Path, *extra: str) -> list[str]:
    return ["measure", "--sim", "--virtual-clock", "--plan", str(plan), "--out", str(out), *extra]


# --------------------------------------------------------------------------- limits


@pytest.mark.parametrize("limits, fragment", [
    # the generic supply profile takes 1e-4 .. 1 A (instruments/drivers/profiles/generic-dc-supply.toml)
    ({"current_limit_A": 100.0}, "limits.current_limit_A"),
    ({"current_limit_A": 1e-9}, "limits.current_limit_A"),
    ({"current_limit_A": 1.5}, "outside the supply's range 0.0001 .. 1 A"),
    ({"max_ramp_V_per_s": 1e9}, "limits.max_ramp_V_per_s"),
    ({"bias_tolerance_V": 1e18}, "limits.bias_tolerance_V"),
    ({"temp_tolerance_C": 1e18}, "limits.temp_tolerance_C"),
    ({"discharge_wait_s": None, "discharge_R_ohm": 110e3, "safe_V": 1e20}, "limits.safe_V"),
    ({"discharge_wait_s": None, "discharge_R_ohm": 110e3, "safe_V": 5e-324}, "limits.safe_V"),
    ({"discharge_wait_s": 1e12}, "limits.discharge_wait_s"),
])
def test_out_of_bounds_limits_refused_before_anything_is_written(tmp_path, capsys, limits, fragment):
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES, limits=limits)
    line = one_line_exit_2(capsys, measure(plan, tmp_path / "run"))
    assert fragment in line
    assert not (tmp_path / "run").exists()


def test_dwell_of_1e12_s_refused(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES, measure={"dwell_s": 1e12})
    assert "measure.dwell_s" in one_line_exit_2(capsys, measure(plan, tmp_path / "run"))
    assert not (tmp_path / "run").exists()


def test_channel_outside_the_scanner_refused_before_opening(tmp_path):
    # the generic scanner profile routes channels 1 .. 16 ([route] of generic-scanner.toml)
    from benchkit.sweep import run_sweep

    bench = parse_bench_text(
        "\n".join(f'[instrument.{r}]\nresource = "TCPIP0::127.0.0.1::1::SOCKET"'
                  for r in ("meter", "supply", "scanner", "thermometer"))
        + '\n[[channel]]\nchannel = 1000\nsample_id = "FX-99"\npart_id = "BD-1004"\n', "bench.toml")
    plan = load_plan(write_plan(tmp_path / "plan.toml"))
    with pytest.raises(UserError, match="channel 1000 is outside the scanner's channels 1 .. 16"):
        run_sweep(bench, plan, tmp_path / "run")  # port 1: opening would fail loudly instead
    assert not (tmp_path / "run").exists()


def test_above_rating_needs_the_flag_and_a_confirmation(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES[:1], bias={"stop_V": 8.0},
                      limits={"allow_above_rated": True})
    # no terminal under pytest and no --yes: refused, nothing written
    line = one_line_exit_2(capsys, measure(plan, tmp_path / "run"))
    assert "above the rated 6.3 V" in line and "--yes" in line
    assert not (tmp_path / "run").exists()
    assert main(measure(plan, tmp_path / "run", "--yes")) == 0
    err = capsys.readouterr().err
    assert "FX-01" in err and "ABOVE RATING" in err and "up to 8 V" in err  # the summary
    rows = read_rows(tmp_path / "run")
    assert rows and all("above_rated" in r["flags"].split(";") for r in rows)
    meta = read_meta(tmp_path / "run")
    assert meta["above_rated"] == {"allowed": True, "samples": ["FX-01"], "confirmed_by": "--yes"}


def test_summary_before_and_final_state_after(tmp_path, capsys):
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES)
    assert main(measure(plan, tmp_path / "run")) == 0
    err = capsys.readouterr().err
    # FX-01: 0, 2, 4, 2, 0 V at 5 V/s and 1 s dwell: 8 V / 5 V/s of ramps + 5 x 1 s = 6.6 s [derived]
    assert "FX-01 (BD-1001, rated 6.3 V, channel 1): up to 4 V, current limit 0.01 A, ramp 5 V/s" in err
    assert "supply final state: output off, set 0 V" in err
    events = read_meta(tmp_path / "run")["events"]
    kinds = [e["event"] for e in events]
    final = events[kinds.index("supply_final_state")]
    assert final["output_on"] is False and final["voltage_set_V"] == 0.0
    assert kinds.index("output_off") < kinds.index("supply_final_state")
    summ = read_meta(tmp_path / "run")["summary"][0]
    assert summ["expected_min_s"] == pytest.approx(8 / 5 + 5 * 1.0)


# --------------------------------------------------------------------------- readers


def deep_toml(kind: str) -> str:
    return {"plan": "[bias]\npoints_V = " + "[" * 1000 + "]" * 1000 + "\n",
            "parts": 'company = "x"\n' + "[[part]]\nid = " + "{a=" * 1000 + "1" + "}" * 1000 + "\n",
            "bench": "a" + ".a" * 1000 + " = 1\n"}[kind]


@pytest.mark.parametrize("kind", ["plan", "parts", "bench"])
def test_nesting_1000_deep_is_one_line(tmp_path, capsys, kind):
    f = tmp_path / f"{kind}.toml"
    f.write_text(deep_toml(kind))
    good_plan = write_plan(tmp_path / "good.toml", samples=SAMPLES)
    argv = {"plan": measure(f, tmp_path / "run"),
            "parts": measure(good_plan, tmp_path / "run", "--parts", str(f)),
            "bench": ["measure", "--bench", str(f), "--plan", str(good_plan), "--out", str(tmp_path / "run")]}[kind]
    assert "nested" in one_line_exit_2(capsys, argv)
    assert not (tmp_path / "run").exists()


@pytest.mark.parametrize("sample_id, fragment", [
    ("X" * 1000, "at most 64"),
    ("X" * 200_000, "line 4: longer than 200000 characters"),
    ("FX\x1b[2J", "control character \\x1b"),
    ("FX\n01", "control character \\n"),
    ("FX\x0001", "control character \\x00"),
])
def test_ids_are_bounded_and_printable(tmp_path, capsys, sample_id, fragment):
    plan = write_plan(tmp_path / "plan.toml",
                      samples=[{"sample_id": sample_id, "part_id": "BD-1001", "channel": 1}])
    assert fragment in one_line_exit_2(capsys, measure(plan, tmp_path / "run"))
    assert not (tmp_path / "run").exists()


def test_unknown_keys_get_a_suggestion_also_inside_channel():
    text = ("\n".join(f'[instrument.{r}]\nresource = "TCPIP0::127.0.0.1::5025::SOCKET"'
                      for r in ("meter", "supply", "scanner", "thermometer"))
            + '\n[[channel]]\nchannel = 1\nsample_id = "FX-01"\npart_idd = "BD-1001"\n')
    with pytest.raises(UserError, match=r"channel entry 1: unknown field 'part_idd'; did you mean 'part_id'\?"):
        parse_bench_text(text, "bench.toml")


def test_unknown_plan_key_gets_a_suggestion(tmp_path):
    f = write_plan(tmp_path / "plan.toml", limits={"curent_limit_A": 0.01})
    with pytest.raises(UserError, match=r"'limits.curent_limit_A': unknown field; did you mean 'current_limit_A'\?"):
        load_plan(f)


# --------------------------------------------------------------------------- resume and fit


@pytest.fixture
def aborted(tmp_path, capsys):
    """An aborted run of two samples (a meter error mid-way through the second), on the simulated bench."""
    plan = write_plan(tmp_path / "plan.toml", samples=SAMPLES)
    assert main(measure(plan, tmp_path / "run", "--fault", "error:after=60")) == 1
    capsys.readouterr()
    run = tmp_path / "run"
    assert 0 < len(read_rows(run)) < 10 and read_meta(run)["status"] == "aborted"
    return run


def edit_meta(run: Path, change) -> None:
    meta = read_meta(run)
    change(meta)
    (run / "run.json").write_text(json.dumps(meta, indent=2))


def test_tampered_rating_in_run_json_is_refused(aborted, capsys):
    before = (aborted / "points.csv").read_bytes()
    edit_meta(aborted, lambda m: m["samples"][0]["part"].__setitem__("rated_V", 60.0))
    line = one_line_exit_2(capsys, ["measure", "--resume", str(aborted)])
    assert "samples[1].part.rated_V = 60.0 but the catalogue says 6.3" in line
    assert (aborted / "points.csv").read_bytes() == before


def test_tampered_discharge_wait_is_refused(aborted, capsys):
    edit_meta(aborted, lambda m: m.__setitem__("discharge_wait_s", 0.0))
    assert "discharge_wait_s" in one_line_exit_2(capsys, ["measure", "--resume", str(aborted)])


@pytest.mark.parametrize("column", ["C_F", "flags"])
def test_edited_row_is_found_by_resume_and_fit(aborted, capsys, column):
    path = aborted / "points.csv"
    lines = path.read_text().splitlines(keepends=True)
    i = runlog.COLUMNS.index(column)
    fields = lines[3].split(",")
    fields[i] = "1e-06" if column == "C_F" else "retried"
    lines[3] = ",".join(fields)
    path.write_text("".join(lines))
    line = one_line_exit_2(capsys, ["measure", "--resume", str(aborted)])
    assert "points.csv: line 4 differs from the line written during the run" in line
    with pytest.raises(UserError, match="line 4 differs"):
        read_run_dir(aborted)


def test_resume_after_an_untouched_abort_completes(aborted, capsys):
    done = read_rows(aborted)
    assert main(["measure", "--resume", str(aborted)]) == 0
    rows = read_rows(aborted)
    assert len(rows) == read_meta(aborted)["n_points_planned"]
    # the interrupted branch restarts from 0 V through the points measured before the stop
    first = rows[len(done)]
    earlier = [float(r["bias_set_V"]) for r in done if r["sample_id"] == first["sample_id"]
               and r["repeat"] == first["repeat"]]
    restarts = [e for e in read_meta(aborted)["events"] if e["event"] == "resume_branch_restart"]
    assert first["step_index"] != "0" and earlier  # the fault stops FX-04 mid-branch
    assert restarts[0]["sample_id"] == first["sample_id"] and restarts[0]["retraced_V"] == earlier
    assert "resumed" in first["flags"].split(";")
    assert "restarts from 0 V" in capsys.readouterr().err
    read_run_dir(aborted)  # the chain of the finished run checks out


@pytest.mark.parametrize("column, text, fragment", [
    ("C_std_F", "-1e-09", "C_std_F = -1e-09 is negative"),
    ("bias_set_V", "1_0", "'1_0' is not a number"),
    ("C_F", "nan", "'nan' is not a number"),
    ("C_F", "inf", "'inf' is not a number"),
    ("C_F", "1e-06\x00", "control character \\x00"),
])
def test_fit_reads_aborted_runs_with_the_same_checks(aborted, column, text, fragment):
    (aborted / runlog.CHAIN_FILE).unlink()  # as if from a benchkit without row digests
    edit_meta(aborted, lambda m: m.pop("points_chain"))
    path = aborted / "points.csv"
    lines = path.read_text().splitlines(keepends=True)
    fields = lines[2].split(",")
    fields[runlog.COLUMNS.index(column)] = text
    lines[2] = ",".join(fields)
    path.write_text("".join(lines))
    with pytest.raises(UserError, match=None) as exc:
        read_run_dir(aborted)
    assert fragment in str(exc.value) and "line 3" in str(exc.value)


def test_fit_refuses_a_duplicated_row(aborted):
    (aborted / runlog.CHAIN_FILE).unlink()
    edit_meta(aborted, lambda m: m.pop("points_chain"))
    path = aborted / "points.csv"
    lines = path.read_text().splitlines(keepends=True)
    path.write_text("".join(lines + [lines[2]]))
    with pytest.raises(UserError, match="repeats the point of line 3"):
        read_run_dir(aborted)


def test_fit_refuses_a_run_whose_chain_was_removed(aborted):
    (aborted / runlog.CHAIN_FILE).unlink()
    with pytest.raises(UserError, match="points.chain: missing"):
        read_run_dir(aborted)


# --------------------------------------------------------------------------- memory


def test_planned_points_are_made_when_asked_for_and_equal_the_full_list():
    from benchkit.sweep.plan import PlannedPoint, PlannedPoints

    seq = [("rising", 0.0), ("rising", 2.0), ("falling", 0.0)]
    lazy = PlannedPoints("FX-01", seq, 1000)
    full = tuple(PlannedPoint("FX-01", r, i, br, v) for r in range(1, 1001) for i, (br, v) in enumerate(seq))
    assert len(lazy) == 3000 and lazy == full and tuple(lazy) == full
    assert lazy[-1] == full[-1] and lazy[1500] == full[1500] and lazy[10:13] == full[10:13]
    with pytest.raises(IndexError):
        lazy[3000]
