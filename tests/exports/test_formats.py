"""Exports of one curve: CSV table, JSON document, SPICE text; `benchkit export` on the command line."""

from __future__ import annotations

import csv
import io
import json

import numpy as np
import pytest

from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.exports import render
from benchkit.exports.paths import inside, safe_stem
from benchkit.exports.spice import spice_subcircuit, subckt_name
from benchkit.exports.table_csv import COLUMNS, curve_csv, read_curve_csv


def test_csv_columns_and_values(ex):
    curve = ex.fitted_curve("tanh")
    text = curve_csv(curve, n_points=11)
    block = [ln for ln in text.splitlines() if ln.startswith("#")]
    assert text.startswith("# format = benchkit-curve-table\n") and any("units =" in ln for ln in block)
    # read back with the standard library's csv reader, the '#' block skipped as comments
    rows = list(csv.reader(ln for ln in io.StringIO(text) if not ln.startswith("#")))
    assert tuple(rows[0]) == COLUMNS == ("bias_V", "C_F", "delta_C_pct", "u_C_F")
    data = np.array(rows[1:], dtype=float)
    lo, hi = curve.valid_range_V
    np.testing.assert_array_equal(data[:, 0], np.linspace(lo, hi, 11))
    np.testing.assert_allclose(data[:, 1], curve.C(data[:, 0]), rtol=1e-15)
    # delta_C_pct = 100 (C(V)/C(0) - 1), the usual "% change from 0 V" of DC-bias curves [common practice]
    np.testing.assert_allclose(data[:, 2], 100.0 * (curve.C(data[:, 0]) / curve.C(0.0) - 1.0), rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(data[:, 3], curve.u_C(data[:, 0]), rtol=1e-15)


def test_csv_never_extrapolates(ex):
    curve = ex.fitted_curve("tanh")
    with pytest.raises(UserError, match="never extrapolated"):
        curve_csv(curve, bias_V=[0.0, curve.valid_range_V[1] + 1.0])


def test_json_round_trip(ex, tmp_path):
    from fits import Curve

    curve = ex.fitted_curve("landau")
    back = Curve.from_json(render(curve, "json"))
    V = np.linspace(*curve.valid_range_V, 50)
    np.testing.assert_allclose(back.C(V), curve.C(V), rtol=1e-12, atol=0)
    assert back.to_dict() == curve.to_dict()


def test_spice_comment_block_and_structure(ex):
    curve = ex.fitted_curve("tanh")
    text = spice_subcircuit(curve, name="BD-1001", esr_ohm=0.05, source_note="library test.sqlite curve 3")
    lines = text.splitlines()
    body = [ln for ln in lines if not ln.startswith("*")]
    assert body == [".subckt BD_1001 a b", body[1], "R1 n1 b 0.05", ".ends BD_1001"]
    assert body[1].startswith("C1 a n1 Q={") and "V(a,n1)" in body[1]
    comments = "\n".join(ln for ln in lines if ln.startswith("*"))
    lo, hi = curve.valid_range_V
    assert f"valid range: {lo:g} V to {hi:g} V" in comments
    assert "1 kHz" in comments and "25 degC" in comments and "CSRS" in comments
    assert "run-invented-7" in comments and "0" * 64 in comments and "curve 3" in comments
    no_esr = spice_subcircuit(curve)
    assert "C1 a b Q={" in no_esr and "R1" not in no_esr.replace("* ESR", "")


def test_spice_names_and_comments_cannot_inject(ex):
    from fits import Curve

    curve = ex.fitted_curve("tanh")
    d = curve.to_dict()
    d["part_id"] = "BD-1\n.include /etc/passwd\n* x"
    evil = Curve.from_dict(d)
    text = spice_subcircuit(evil)
    assert not any(ln.startswith(".include") for ln in text.splitlines())
    assert subckt_name("BD-1\n.include x") == "BD_1_include_x"
    assert subckt_name("1001") == "C_1001"


def test_safe_file_names():
    assert safe_stem("../../etc/passwd") == "etc_passwd"
    assert safe_stem("BD-1'; DROP TABLE part; --") == "BD-1_DROP_TABLE_part_--"
    assert safe_stem("..") == "part"
    with pytest.raises(UserError):
        inside("/tmp/out", "../x")


def test_export_command_each_format(ex, tmp_path, capsys):
    curve = ex.fitted_curve("poly")
    src = tmp_path / "c.json"
    curve.save(src)
    for fmt, suffix in (("csv", ".csv"), ("json", ".json"), ("spice", ".lib")):
        out = tmp_path / f"out{suffix}"
        assert main(["export", str(src), "--format", fmt, "--out", str(out), "--esr", "50m"]) == 0
        assert out.exists()
    cols = read_curve_csv((tmp_path / "out.csv").read_text())
    np.testing.assert_allclose(cols["C_F"], curve.C(cols["bias_V"]), rtol=1e-12)
    assert json.loads((tmp_path / "out.json").read_text())["params"] == curve.to_dict()["params"]
    assert "R1 n1 b 0.05" in (tmp_path / "out.lib").read_text()
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".")]
    assert leftovers == []  # atomic writes leave no temporary files behind


def test_export_command_errors(tmp_path, capsys):
    bad = tmp_path / "bad.json"
    bad.write_text('{"format": "benchkit-curve", "version": 1}')
    code = main(["export", str(bad), "--format", "csv", "--out", str(tmp_path / "x.csv")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "model" in err
    assert not (tmp_path / "x.csv").exists()
    code = main(["export", str(tmp_path / "missing.json"), "--format", "csv", "--out", str(tmp_path / "x.csv")])
    assert code == 2
    code = main(["export", str(bad), "--format", "touchstone", "--out", str(tmp_path / "x.s1p")])
    assert code == 2
