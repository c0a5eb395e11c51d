"""Adding run directories: fitted as `benchkit fit` fits them, identity by points sha256, ESR kept."""

from __future__ import annotations

import json

import numpy as np
import pytest

from benchkit.cli import main
from benchkit.errors import UserError


def test_add_run_dir_fits_both_branches(lib, mk, tmp_path):
    run = mk.write_run(tmp_path / "run-1", samples=("FX-01", "FX-02"))
    s = lib.add_run(run, "BD-1001")
    assert not s.already_present and s.added == 4  # 2 samples x (rising, falling)
    assert sorted((c.sample_id, c.branch) for c in s.curves) == [
        ("FX-01", "falling"), ("FX-01", "rising"), ("FX-02", "falling"), ("FX-02", "rising")]
    [info] = lib.runs()
    assert info.points_sha256 == json.loads((run / "run.json").read_text())["points_sha256"]
    assert info.manifest["run_id"] == "run-run-1"
    for rec in lib.curves("BD-1001"):
        assert rec.points_sha256 == info.points_sha256 and rec.run_path == str(run.resolve())
        assert rec.esr_ohm == pytest.approx(0.02)  # the median Rs_ohm of the points
        assert rec.temp_C == pytest.approx(25.0)
        # the fitted curve follows the invented truth (2 % tolerance: 0.2 % noise, the falling
        # branch sits 1 % higher, and model auto may pick a different family)
        V = np.linspace(*rec.valid_range_V, 7)
        np.testing.assert_allclose(rec.curve.C(V), mk.tanh_C(V, **mk.tanh_params()), rtol=0.02)


def test_same_run_twice_and_from_a_second_bench(lib, mk, tmp_path, capsys):
    run = mk.write_run(tmp_path / "run-2")
    first = lib.add_run(run, "BD-1001")
    n = lib.summary()
    again = lib.add_run(run, "BD-1001")
    assert first.added == 2 and again.already_present and lib.summary() == n
    # a copy of the run directory elsewhere (same points.csv bytes) is the same run
    import shutil

    copy = tmp_path / "elsewhere" / "run-2"
    shutil.copytree(run, copy)
    code = main(["library", "--library", str(lib.target), "add", str(copy), "--part", "BD-1001"])
    assert code == 0 and "nothing added" in capsys.readouterr().out
    assert lib.summary() == n


def test_run_and_fit_command_curve_are_the_same_curve(lib, mk, tmp_path):
    # `benchkit fit RUN --out c.json` then `library add c.json` gives the very curve that
    # `library add RUN` stores: stored once (content hash)
    run = mk.write_run(tmp_path / "run-3")
    out = tmp_path / "c.json"
    assert main(["fit", str(run), "--out", str(out)]) == 0
    lib.add_run(run, "BD-1001")
    n = lib.summary()["curve"]
    cid, added = lib.add_curve(json.loads(out.read_text()))
    assert not added and lib.summary()["curve"] == n


def test_run_problems_are_one_line(lib, mk, tmp_path):
    run = mk.write_run(tmp_path / "run-4", part_id="BD-1002")
    with pytest.raises(UserError, match="no points of part 'BD-1001'"):
        lib.add_run(run, "BD-1001")
    lib.remove_part("BD-1002")
    with pytest.raises(UserError, match="not in the library"):
        lib.add_run(run)  # the run's one part, which the library does not hold
    # points edited after the run ended: refused (sha256 differs from run.json)
    run5 = mk.write_run(tmp_path / "run-5")
    lines = (run5 / "points.csv").read_text().splitlines(keepends=True)
    lines[-1] = lines[-1].replace(",CPD,", ",CSD,")  # one field changed, the file still well formed
    (run5 / "points.csv").write_text("".join(lines))
    with pytest.raises(UserError, match="sha256"):
        lib.add_run(run5, "BD-1001")
    # a run still marked running
    run6 = mk.write_run(tmp_path / "run-6")
    meta = json.loads((run6 / "run.json").read_text())
    meta["status"] = "running"
    (run6 / "run.json").write_text(json.dumps(meta))
    with pytest.raises(UserError, match="still running"):
        lib.add_run(run6, "BD-1001")
    assert lib.summary()["curve"] == 0
    assert lib.add_run(run6, "BD-1001", allow_incomplete=True).added == 2
