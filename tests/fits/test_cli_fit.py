"""`benchkit fit RUN_DIR`: run directories in the run-directory format of DEVELOPERS.md written by the
test, curve documents out; bad input -> one line on stderr, exit 2, no file written."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest

from benchkit.cli import main
from fits import Curve

from fits_test_helpers import POINTS_COLUMNS, tanh_branch_points  # conftest puts it on sys.path


def run_cli(capsys, *argv):
    code = main(["fit", *map(str, argv)])
    out, err = capsys.readouterr()
    return code, out, err


def files_under(path):
    return sorted(p.name for p in path.rglob("*") if p.is_file()) if path.exists() else []


def test_one_sample_writes_rising_primary_and_falling_beside(make_run, tmp_path, capsys):
    run = make_run(tanh_branch_points("FX-01", V_off=0.3, seed=1))
    out = tmp_path / "out" / "curve.json"
    code, stdout, err = run_cli(capsys, run, "--out", out, "--plot", tmp_path / "fit.png")
    assert code == 0, err
    rising = Curve.load(out)
    falling = Curve.load(out.with_name("curve-falling.json"))
    assert rising.branch == "rising" and falling.branch == "falling"
    assert rising.model == "tanh"  # auto, best leave-one-out prediction, on tanh-generated data
    # truth of the synthetic sample (conftest): C_inf 1 uF, C_pk 10 uF, V0 2 V, V_off +-0.3 V
    assert rising.params["V0_V"] == pytest.approx(2.0, rel=0.02)
    assert rising.params["V_off_V"] == pytest.approx(0.3, abs=0.05)
    assert falling.params["V_off_V"] == pytest.approx(-0.3, abs=0.05)
    # provenance: sha256 of the points file, run id, sample, part, conditions
    sha = hashlib.sha256((run / "points.csv").read_bytes()).hexdigest()
    assert rising.source["points_sha256"] == sha
    assert rising.source["run_id"] == "RUN-TEST-1"
    assert rising.sample_id == "FX-01" and rising.part_id == "BD-1001"
    # the level the part saw (the points' ac_level_dut_Vrms), not the 1 Vrms set at the meter
    assert rising.conditions == {"freq_Hz": 1000.0, "ac_level_Vrms": 0.157, "temp_C": 25.0,
                                 "function": "CPD",
                                 "ac_level_source": "level across the part (median of the points)"}
    assert rising.valid_range_V == (0.0, 6.0)
    assert (tmp_path / "fit.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "FX-01 rising: tanh" in stdout


def test_weights_come_from_C_std_over_sqrt_n(make_run, tmp_path, capsys):
    run = make_run(tanh_branch_points("FX-01", seed=2, both=False))
    out = tmp_path / "c.json"
    assert run_cli(capsys, run, "--out", out, "--model", "tanh")[0] == 0
    c = Curve.load(out)
    assert c.stats["weighting"] == "given sigma"
    # the 0.2 % noise of the synthetic points matches its stated C_std_F/sqrt(5): chi2_red ~ 1
    assert 0.3 < c.stats["chi2_red"] < 2.5


def test_several_samples_need_a_directory(make_run, tmp_path, capsys):
    run = make_run(tanh_branch_points("FX-01", seed=3) + tanh_branch_points("FX-02", seed=4))
    bad = tmp_path / "x.json"
    code, _, err = run_cli(capsys, run, "--out", bad)
    assert code == 2 and "2 samples" in err and err.count("\n") == 1
    assert not bad.exists()
    outdir = tmp_path / "curves"
    code, _, err = run_cli(capsys, run, "--out", outdir, "--plot", tmp_path / "p.pdf",
                           "--model", "landau")
    assert code == 0, err
    assert files_under(outdir) == ["FX-01-falling.json", "FX-01-rising.json",
                                   "FX-02-falling.json", "FX-02-rising.json"]
    assert Curve.load(outdir / "FX-02-rising.json").model == "landau"
    for sid in ("FX-01", "FX-02"):
        assert (tmp_path / f"p-{sid}.pdf").read_bytes()[:4] == b"%PDF"
    code, _, _ = run_cli(capsys, run, "--sample", "FX-02", "--out", tmp_path / "one.json")
    assert code == 0 and Curve.load(tmp_path / "one.json").sample_id == "FX-02"


def test_overload_points_left_out(make_run, tmp_path, capsys):
    pts = tanh_branch_points("FX-01", seed=5, both=False)
    pts[4] = dict(pts[4], C_F=9.9e37, flags="overload")  # meter overrange value
    run = make_run(pts)
    code, stdout, err = run_cli(capsys, run, "--out", tmp_path / "c.json")
    assert code == 0, err
    assert Curve.load(tmp_path / "c.json").stats["n_points"] == len(pts) - 1
    assert "1 point(s) left out" in err and "left out" not in stdout  # a note: stderr, not the results


def _bad_runs():
    good = tanh_branch_points("FX-01", seed=6, both=False)
    return {
        "no points": (dict(points=[]), "no measured points"),
        "bad header": (dict(points=good, header=[c for c in POINTS_COLUMNS if c != "C_F"]), "header"),
        "negative C": (dict(points=[dict(good[0], C_F=-1e-6)] + good[1:]), "not a positive"),
        "text C": (dict(points=[dict(good[0], C_F="abc")] + good[1:]), "'abc' is not a number"),
        "one bias": (dict(points=[dict(p, bias_set_V=2.0) for p in good]), "at one bias"),
        "few points": (dict(points=good[:2]), "needs at least"),
        "sha mismatch": (dict(points=good, sha="0" * 64), "sha256 differs"),
    }


@pytest.mark.parametrize("case", sorted(_bad_runs()))
def test_bad_input_exit_2_one_line_no_file(case, make_run, tmp_path, capsys):
    kwargs, expect = _bad_runs()[case]
    run = make_run(kwargs.pop("points"), **kwargs)
    out = tmp_path / "out"
    code, _, err = run_cli(capsys, run, "--out", out / "c.json", "--plot", out / "p.png")
    assert code == 2
    assert expect in err and err.startswith("benchkit: error: ") and err.count("\n") == 1
    assert files_under(out) == []


def test_missing_run_dir_and_bad_options(tmp_path, capsys, make_run):
    code, _, err = run_cli(capsys, tmp_path / "nope", "--out", tmp_path / "c.json")
    assert code == 2 and "not a directory" in err
    run = make_run(tanh_branch_points("FX-01", seed=7, both=False))
    code, _, err = run_cli(capsys, run, "--out", tmp_path / "c.json", "--plot", tmp_path / "p.gif")
    assert code == 2 and ".png or .pdf" in err
    code, _, err = run_cli(capsys, run, "--out", tmp_path / "c.json", "--sample", "FX-99")
    assert code == 2 and "FX-99" in err
    assert files_under(tmp_path / "c.json") == [] and not (tmp_path / "c.json").exists()


def test_report_and_json_readable_by_library_style_reader(make_run, tmp_path, capsys):
    run = make_run(tanh_branch_points("FX-01", seed=8))
    code, stdout, _ = run_cli(capsys, run, "--out", tmp_path / "c.json", "--report")
    assert code == 0
    assert "Model choice" in stdout and "Correlations" in stdout
    doc = json.loads((tmp_path / "c.json").read_text())
    assert doc["format"] == "benchkit-curve" and doc["branch"] == "rising"
    assert np.isfinite(doc["stats"]["bic"])


def test_lack_of_fit_and_flat_parts_are_said_on_the_terminal(make_run, tmp_path, capsys):
    # tanh forced on a stretched-exponential fall it cannot follow (invented truth of
    # benchkit.benchmarks.independent_truths), and a flat C0G-like part (no bias
    # dependence [common practice]) fitted auto: the terminal says which is which
    from benchkit.benchmarks import independent_truths as T

    V, C, s, br = T.sweep("stretched-exp", 1)
    pts = [{"sample_id": "FX-01", "branch": b, "bias_set_V": v, "C_F": c,
            "C_std_F": repr(float(x * np.sqrt(5))), "n_readings": 5}
           for v, c, x, b in zip(V, C, s, br)]
    run = make_run(pts)
    code, stdout, err = run_cli(capsys, run, "--model", "tanh", "--out", tmp_path / "t.json")
    assert code == 0, err
    assert "LACK OF FIT: the model does not describe the data" in stdout
    doc = json.loads((tmp_path / "t.json").read_text())
    assert doc["stats"]["describes_data"] is False and doc["model_error_F"] > 0
    rng = np.random.default_rng(4)
    flat = [{"sample_id": "FX-02", "branch": "rising", "bias_set_V": v,
             "C_F": 100e-9 * (1 + 0.002 * rng.normal()), "C_std_F": repr(float(0.002 * 100e-9 * np.sqrt(5))),
             "n_readings": 5} for v in np.linspace(0, 50, 11)]
    run = make_run(flat, name="flat")
    code, stdout, err = run_cli(capsys, run, "--out", tmp_path / "f.json")
    assert code == 0, err
    assert "flat within noise" in stdout and "R^2" not in stdout
