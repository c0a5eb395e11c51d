"""`python -m benchkit.benchmarks --quick`: runs every benchmark on a small size and writes
one JSON with the keys the issue asks for. No time is asserted: only that each figure is
there and is the ratio it says it is."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

from benchkit.sweep.adaptive import STOP_STALLED
from benchkit.benchmarks import runner

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    out = tmp_path_factory.mktemp("bench")
    proc = subprocess.run([sys.executable, "-m", "benchkit.benchmarks", "--out", str(out), "--quick"],
                          cwd=REPO, capture_output=True, text=True, timeout=600)
    return proc, out


def test_quick_run_writes_json_and_table(quick):
    proc, out = quick
    assert proc.returncode == 0, proc.stderr
    res = json.loads((out / "bench.json").read_text())
    assert res["format"] == "benchkit-bench" and res["quick"] is True
    assert len(res["git"]["commit"]) == 40  # the commit the figures belong to
    assert res["machine"]["platform"] and res["machine"]["cpu_count"] >= 1
    assert res["date_utc"].endswith("Z")
    table = (out / "bench.txt").read_text()
    assert table.strip() in proc.stdout  # the same table on stdout
    for title in ("Bench time", "Software overhead", "physics floor", "Fits per second",
                  "Library query"):
        assert title in table


def test_bench_time_keys_per_part(quick):
    _, out = quick
    bt = json.loads((out / "bench.json").read_text())["benchmarks"]["bench_time"]
    assert set(bt["parts"]) == {"BD-1001", "BD-1008"}  # --quick: two parts
    for pid, r in bt["parts"].items():
        u, a = r["uniform"], r["adaptive"]
        assert r["bench_time_ratio"] == pytest.approx(a["bench_s"] / u["bench_s"])
        for sweep in (u, a):
            assert sweep["max_error_pct_of_C0"] >= 0 and sweep["points"] >= 7
            assert set(sweep["max_error_pct_of_C0_by_branch"]) == {"rising", "falling"}
        # the recorded points' honesty: finite and of order 1 for settled, honest points
        assert 0.0 < a["points_rms_z"] < 10.0 and 0.0 <= a["points_share_beyond_2u"] <= 1.0
        assert a["stop_reason"] in ("target met", "point budget reached", STOP_STALLED,
                                    "resolution limit: no gap wide enough for another point")
        # the uniform sweep is 0.5 V steps up and back: 2*top/0.5 + 1 points
        assert u["points"] == round(2 * r["top_V"] / 0.5) + 1


def test_point_z_is_the_error_over_the_standard_error_of_the_mean():
    # standard error of a mean of n readings: s/sqrt(n) [handbook: standard error of the mean]
    from benchkit.benchmarks.bench_time import point_z

    rows = [{"C_F": "1.02e-6", "C_std_F": "4e-8", "n_readings": "4", "bias_set_V": "1.0"},
            {"C_F": "0.99e-6", "C_std_F": "1e-8", "n_readings": "1", "bias_set_V": "2.0"},
            {"C_F": "", "C_std_F": "", "n_readings": "0", "bias_set_V": "3.0"},  # overload
            {"C_F": "1.0e-6", "C_std_F": "", "n_readings": "1", "bias_set_V": "4.0"}]
    z = point_z(rows, lambda r: 1.0e-6)
    assert z == pytest.approx([0.02e-6 / 2e-8, -0.01e-6 / 1e-8])


def test_overhead_fits_and_library_keys(quick):
    _, out = quick
    b = json.loads((out / "bench.json").read_text())["benchmarks"]
    ov = b["overhead"]
    assert ov["engine_over_bare"] == pytest.approx(ov["engine_point_wall_s"] / ov["bare_point_wall_s"])
    assert ov["exchanges_per_point"] > 5 and ov["points"] >= 10
    if ov["pymeasure_point_wall_s"] is not None:
        assert ov["engine_over_pymeasure"] == pytest.approx(
            ov["engine_point_wall_s"] / ov["pymeasure_point_wall_s"])
    else:
        assert "PyMeasure" in ov["pymeasure_skipped"]
    fl = b["floor"]
    assert fl["over_floor_pct"] == pytest.approx(
        100.0 * (fl["wall_s"] / fl["physics_floor_s"] - 1.0))
    # the floor is at least the dwells of the points between the first and the last
    assert fl["physics_floor_s"] >= (fl["points"] - 1) * fl["dwell_s"]
    for name in ("tanh", "poly", "landau"):
        f = b["fits"]["models"][name]
        assert f["curve_fit_over_fit_sweep"] == pytest.approx(f["curve_fit_per_s"] / f["fit_sweep_per_s"])
        # the bare curve_fit found the same curve as fit_sweep (the same law on the same data)
        assert f["max_curve_difference_pct_of_C0"] < 0.1
    lq = b["library_query"]
    assert "error" not in lq and lq["n_curves"] == runner.QUICK_CURVES and lq["query_warm_s"] > 0


def test_a_failing_benchmark_is_reported_and_the_rest_still_run(tmp_path, monkeypatch):
    def broken(out_dir, quick, parts, log):
        raise RuntimeError("instrument on fire")

    monkeypatch.setitem(runner.BENCHMARKS, "broken", broken)
    res, table = runner.run_all(tmp_path, quick=True, only=["broken", "library_query"], log=lambda s: None)
    assert runner.failed(res) == ["broken"]
    assert "instrument on fire" in res["benchmarks"]["broken"]["error"]
    assert "error" not in res["benchmarks"]["library_query"]
    assert json.loads((tmp_path / "bench.json").read_text())["benchmarks"]["broken"]["error"]
