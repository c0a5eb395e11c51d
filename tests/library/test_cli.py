"""`benchkit library ...` end to end through benchkit.cli.main."""

from __future__ import annotations

import json

import pytest

from benchkit.cli import main

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # [standard: PNG specification (ISO/IEC 15948), file signature]


def _run(capsys, *argv):
    code = main(list(argv))
    out = capsys.readouterr()
    return code, out.out, out.err


def test_add_parts_from_the_demo_catalogue(tmp_path, capsys):
    # the real parts file of the repo (DEVELOPERS.md, "File formats": parts file), read by benchkit.catalogue.load_parts
    from benchkit.catalogue import DEMO_PARTS, load_parts

    lib = str(tmp_path / "demo.sqlite")
    code, out, _ = _run(capsys, "library", "--library", lib, "add-parts", str(DEMO_PARTS))
    n = len(load_parts(DEMO_PARTS))
    assert code == 0 and f"{n} parts added" in out
    code, out, _ = _run(capsys, "library", "add-parts", str(DEMO_PARTS), "--library", lib)
    assert code == 0 and f"{n} unchanged" in out
    code, out, _ = _run(capsys, "library", "--library", lib, "list")
    assert code == 0 and len(out.strip().splitlines()) == n + 1


def test_workflow(tmp_path, capsys, parts_toml, mk, monkeypatch):
    lib = tmp_path / "lab.sqlite"
    monkeypatch.setenv("BENCHKIT_LIBRARY", str(lib))  # the documented default path
    assert _run(capsys, "library", "add-parts", str(parts_toml))[0] == 0
    run = mk.write_run(tmp_path / "run-1")
    code, out, _ = _run(capsys, "library", "add", str(run), "--part", "BD-1001")
    assert code == 0 and "2 curves of part BD-1001 added" in out
    curve = tmp_path / "c2.json"
    mk.make_curve("landau", {"C0_F": 4.7e-6, "V_k_V": 6.0, "C_p_F": 0.2e-6}, valid=(0.0, 16.0),
                  part_id="BD-1002").save(curve)
    code, out, _ = _run(capsys, "library", "add", str(curve), "--esr", "15m")
    assert code == 0 and "added" in out
    code, out, _ = _run(capsys, "library", "list", "--class", "X7R")
    assert code == 0 and "BD-1002" in out and "BD-1001" not in out

    png = tmp_path / "bd1001.png"
    code, out, _ = _run(capsys, "library", "show", "BD-1001", "--plot", str(png))
    assert code == 0 and "curve 1" in out and "curve 2" in out
    assert png.read_bytes()[:8] == PNG_SIGNATURE

    code, out, _ = _run(capsys, "library", "query", "--bias", "5V", "--temp", "25", "--json")
    answer = {r["part_id"]: r for r in json.loads(out)}
    assert answer["BD-1001"]["covered"] and answer["BD-1002"]["covered"] and not answer["BD-1003"]["covered"]
    code, out, _ = _run(capsys, "library", "query", "--bias", "12", "--min", "1u")
    assert code == 0 and "not covered" in out and "BD-1001" in out.split("not covered:")[1]

    out_file = tmp_path / "bd1002.lib"
    code, out, _ = _run(capsys, "library", "export", "BD-1002", "--format", "spice", "--out", str(out_file))
    text = out_file.read_text()
    assert code == 0 and "R1 n1 b 0.015" in text and ".subckt BD_1002 a b" in text

    code, out, _ = _run(capsys, "library", "remove", "BD-1001", "--curve", "1")
    assert code == 0
    code, out, _ = _run(capsys, "library", "remove", "BD-1002")
    assert code == 0 and "with 1 curves" in out


def test_query_help_states_the_rules(capsys):
    with pytest.raises(SystemExit):
        main(["library", "query", "--help"])
    text = capsys.readouterr().out
    assert "NOT COVERED" in text and "interpolated" in text and "2 degC" in text
    with pytest.raises(SystemExit):
        main(["library", "--help"])
    assert ".local/share/benchkit/library.sqlite" in capsys.readouterr().out


def test_bad_bias_value_one_line(tmp_path, capsys, parts_toml):
    lib = str(tmp_path / "l.sqlite")
    _run(capsys, "library", "--library", lib, "add-parts", str(parts_toml))
    code, _, err = _run(capsys, "library", "--library", lib, "query", "--bias", "12 volts")
    assert code == 2 and err.count("\n") == 1 and "--bias" in err


def test_bad_parts_file_one_line(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text('[[part]]\nid = "BD-1"\nrated_V = -3\n')
    code, _, err = _run(capsys, "library", "--library", str(tmp_path / "l.sqlite"), "add-parts", str(bad))
    assert code == 2 and err.count("\n") == 1
    assert not (tmp_path / "l.sqlite").exists()


def test_add_all_parts_of_a_run(tmp_path, capsys, parts_toml, mk):
    lib = str(tmp_path / "l.sqlite")
    run = mk.write_run(tmp_path / "run-m", samples=("FX-01", "FX-02"), part_of={"FX-02": "BD-1002"})
    _run(capsys, "library", "--library", lib, "add-parts", str(parts_toml))
    code, _, err = _run(capsys, "library", "--library", lib, "add", str(run))
    assert code == 2 and "--all-parts" in err
    code, out, _ = _run(capsys, "library", "--library", lib, "add", str(run), "--all-parts")
    assert code == 0 and "part BD-1001 added" in out and "part BD-1002 added" in out
    code, out, _ = _run(capsys, "library", "--library", lib, "query", "--bias", "3", "--json")
    assert sum(r["covered"] for r in json.loads(out)) == 2


def test_add_all_parts_refuses_before_fitting_when_a_part_is_missing(tmp_path, capsys, mk):
    lib = str(tmp_path / "l.sqlite")
    run = mk.write_run(tmp_path / "run-m", samples=("FX-01", "FX-02"), part_of={"FX-02": "BD-7777"})
    from benchkit.library import Library

    with Library(lib) as library:
        library.add_parts(mk.PARTS)
    code, _, err = _run(capsys, "library", "--library", lib, "add", str(run), "--all-parts")
    assert code == 2 and "BD-7777" in err
    with Library(lib) as library:
        assert library.summary()["curve"] == 0


def test_import_command_twice(tmp_path, capsys, parts_toml, mk):
    a, b = str(tmp_path / "a.sqlite"), str(tmp_path / "b.sqlite")
    _run(capsys, "library", "--library", a, "add-parts", str(parts_toml))
    curve = tmp_path / "c.json"
    mk.make_curve().save(curve)
    _run(capsys, "library", "--library", a, "add", str(curve))
    code, out, _ = _run(capsys, "library", "--library", b, "import", a)
    assert code == 0 and "3 parts, 0 runs, 1 curves added" in out
    code, out, _ = _run(capsys, "library", "--library", b, "import", a)
    assert code == 0 and "0 parts, 0 runs, 0 curves added; 1 curves were already here" in out
