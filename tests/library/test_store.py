"""Library storage: parts, curves, identity, literal names, bad files, schema versions, round trips."""

from __future__ import annotations

import hashlib
import json
import sqlite3

import numpy as np
import pytest

from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.library import Library, latest_version
from benchkit.library import schema

NASTY_ID = "BD-1'; DROP TABLE part; --\"x\"; SELECT * FROM curve WHERE '1'='1"


def _digest(path):
    """Bytes of a file that is not a library (it must not be touched at all)."""
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _content(lib):
    """Everything a library holds: the SQL text of the file (sqlite3 iterdump), or on PostgreSQL
    the library's content fingerprint with its generation counter. Equal means nothing changed."""
    if lib.path is None:
        return lib.fingerprint(), lib.generation
    conn = sqlite3.connect(lib.path)
    try:
        return "\n".join(conn.iterdump())
    finally:
        conn.close()


def _one_line_error(capsys, argv):
    code = main(argv)
    err = capsys.readouterr().err
    return code, err


def test_parts_added_updated_unchanged(lib, parts):
    assert lib.add_parts(parts) == {"added": 0, "updated": 0, "unchanged": 3}
    changed = dict(parts[0], description="10 uF 6.3 V X5R 0402 (revised)")
    assert lib.add_part(changed) == "updated"
    assert lib.part("BD-1001").description.endswith("(revised)")
    assert lib.part("BD-1001").case == "0402"


def test_nasty_part_id_is_stored_and_found_literally(lib, mk, tmp_path, capsys):
    # quotes and semicolons are data, not SQL: every statement is parameterised
    lib.add_part({"id": NASTY_ID, "description": "quote ' and semicolon ;", "nominal_C_F": 1e-6,
                  "rated_V": 10.0, "class_code": "X7R", "case": "0603"})
    lib.add_curve(mk.make_curve(part_id=NASTY_ID))
    assert lib.part(NASTY_ID).part_id == NASTY_ID
    assert {p.part_id for p in lib.parts()} == {"BD-1001", "BD-1002", "BD-1003", NASTY_ID}
    [r] = [r for r in lib.query(1.0) if r.part_id == NASTY_ID]
    assert r.covered
    assert lib.summary()["part"] == 4  # the part table is still there
    # a near miss is not found (no pattern matching, no trimming)
    with pytest.raises(UserError):
        lib.part(NASTY_ID[:-1])
    # the CLI shows it and writes its plot and exports inside the output folder
    out = tmp_path / "exports"
    code = main(["library", "--library", str(lib.target), "export", NASTY_ID, "--format", "json", "--out", str(out)])
    assert code == 0
    written = list(out.iterdir())
    assert len(written) == 1 and written[0].parent == out and "/" not in written[0].name
    assert json.loads(written[0].read_text())["part_id"] == NASTY_ID
    code = main(["library", "--library", str(lib.target), "show", NASTY_ID, "--plot", str(tmp_path / "p.png")])
    assert code == 0 and NASTY_ID in capsys.readouterr().out
    # an injection attempt naming a part that does not exist: one line, exit 2, nothing changed
    before = _content(lib)
    for action in ("show", "remove"):
        code = main(["library", "--library", str(lib.target), action, "x' OR '1'='1'; DELETE FROM curve; --"])
        err = capsys.readouterr().err
        assert code == 2 and err.count("\n") == 1 and "is not in the library" in err
    assert _content(lib) == before


def test_missing_part_one_line_nothing_changed(lib, mk, tmp_path, capsys):
    curve = mk.make_curve(part_id="BD-9999")
    path = tmp_path / "c.json"
    curve.save(path)
    before = _content(lib)
    code, err = _one_line_error(capsys, ["library", "--library", str(lib.target), "add", str(path)])
    assert code == 2 and err.count("\n") == 1 and "BD-9999" in err and "add-parts" in err
    assert _content(lib) == before
    for argv in (["show", "BD-9999"], ["remove", "BD-9999"], ["export", "BD-9999", "--format", "csv", "--out",
                                                               str(tmp_path / "x.csv")]):
        code, err = _one_line_error(capsys, ["library", "--library", str(lib.target)] + argv)
        assert code == 2 and err.count("\n") == 1 and "BD-9999" in err
    assert _content(lib) == before
    assert not (tmp_path / "x.csv").exists()


def test_not_a_library_file(tmp_path, capsys):
    text_file = tmp_path / "notes.sqlite"
    text_file.write_text("this is not a database\n")
    before = text_file.read_bytes()
    code, err = _one_line_error(capsys, ["library", "--library", str(text_file), "list"])
    assert code == 2 and err.count("\n") == 1 and "not a benchkit library" in err
    code, err = _one_line_error(capsys, ["library", "--library", str(text_file), "add-parts", "x.toml"])
    assert code == 2  # the parts file is missing: refused before the library is even opened
    assert text_file.read_bytes() == before


def test_foreign_sqlite_file_left_alone(tmp_path, capsys, parts_toml):
    other = tmp_path / "other.db"
    conn = sqlite3.connect(other)
    conn.execute("CREATE TABLE inventory(item TEXT)")
    conn.commit()
    conn.close()
    before = _digest(other)
    code, err = _one_line_error(capsys, ["library", "--library", str(other), "add-parts", str(parts_toml)])
    assert code == 2 and err.count("\n") == 1 and "not a benchkit library" in err
    assert _digest(other) == before


def test_newer_schema_refused(tmp_path, capsys, parts_toml):
    path = tmp_path / "future.sqlite"
    Library(path).close()
    conn = sqlite3.connect(path)
    conn.execute(f"PRAGMA user_version = {latest_version() + 1}")
    conn.commit()
    conn.close()
    before = _digest(path)
    for argv in (["list"], ["add-parts", str(parts_toml)], ["query", "--bias", "5"]):
        code, err = _one_line_error(capsys, ["library", "--library", str(path)] + argv)
        assert code == 2 and err.count("\n") == 1 and "newer" in err and "update benchkit" in err
    assert _digest(path) == before


def test_missing_library_for_read_commands(tmp_path, capsys):
    path = tmp_path / "none.sqlite"
    code, err = _one_line_error(capsys, ["library", "--library", str(path), "list"])
    assert code == 2 and "no library" in err and not path.exists()


def test_wal_mode_and_version(tmp_path):
    path = tmp_path / "w.sqlite"
    Library(path).close()
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert conn.execute("PRAGMA user_version").fetchone()[0] == latest_version()
    assert conn.execute("SELECT value FROM meta WHERE key = 'format'").fetchone()[0] == "benchkit-library"
    conn.close()


def test_migrations_run_in_order_once_and_atomically(tmp_path, monkeypatch):
    path = tmp_path / "m.sqlite"
    Library(path).close()
    calls = []

    def v2(conn):
        calls.append("v2")
        conn.execute("CREATE TABLE note (text TEXT)")

    before = latest_version()
    monkeypatch.setattr(schema, "MIGRATIONS", schema.MIGRATIONS + [v2])
    Library(path).close()
    Library(path).close()  # already at the new version: not run again
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA user_version").fetchone()[0] == latest_version() == before + 1
    conn.close()
    assert calls == ["v2"]

    def v3_fails(conn):
        conn.execute("CREATE TABLE half (x)")
        raise RuntimeError("migration bug")

    monkeypatch.setattr(schema, "MIGRATIONS", schema.MIGRATIONS + [v3_fails])
    with pytest.raises(RuntimeError):
        Library(path)
    conn = sqlite3.connect(path)
    assert conn.execute("PRAGMA user_version").fetchone()[0] == before + 1  # rolled back whole
    assert conn.execute("SELECT 1 FROM sqlite_master WHERE name = 'half'").fetchone() is None
    conn.close()


def test_default_path_from_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("BENCHKIT_LIBRARY", str(tmp_path / "env.sqlite"))
    assert schema.default_library_path() == tmp_path / "env.sqlite"
    monkeypatch.delenv("BENCHKIT_LIBRARY")
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "xdg"))
    assert schema.default_library_path() == tmp_path / "xdg" / "benchkit" / "library.sqlite"


def test_same_curve_twice_stored_once(lib, mk):
    c = mk.make_curve()
    first = lib.add_curve(c)
    second = lib.add_curve(mk.make_curve())  # built again from the same numbers
    assert first[1] is True and second == (first[0], False)
    assert lib.summary()["curve"] == 1


def test_curve_part_mismatch_refused(lib, mk):
    with pytest.raises(UserError, match="not 'BD-1002'"):
        lib.add_curve(mk.make_curve(part_id="BD-1001"), "BD-1002")


def test_remove_curve_and_part(lib, mk):
    a, _ = lib.add_curve(mk.make_curve(sample_id="FX-01"))
    b, _ = lib.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=9e-6), sample_id="FX-02"))
    lib.remove_curve(a)
    assert [r.curve_id for r in lib.curves("BD-1001")] == [b]
    assert lib.remove_part("BD-1001") == 1
    assert lib.summary() == {"part": 2, "sample": 0, "run": 0, "curve": 0, "verdict": 0}
    with pytest.raises(UserError):
        lib.remove_curve(a)


@pytest.mark.parametrize("model", ["tanh", "landau", "poly", "table"])
def test_json_round_trip_through_library_and_export(lib, mk, tmp_path, model):
    # CURVE.json -> library -> export json -> load: the same C(V) to 1e-12 (relative)
    from fits import Curve

    if model == "table":
        orig = Curve.from_points([0.0, 4.0, 8.0, 16.0], [4.7e-6, 3.9e-6, 2.6e-6, 1.4e-6], [5e-8] * 4,
                                 origin="supplier claim", part_id="BD-1002")
    elif model == "poly":
        orig = mk.make_curve("poly", {"V_scale_V": 16.0, "a0_F": 4.7e-6, "a1_F": -1e-6, "a2_F": -2e-6},
                             valid=(0.0, 16.0), part_id="BD-1002", covariance=np.diag([0, 1e-16, 1e-16, 1e-16]))
    elif model == "tanh":
        orig = mk.make_curve("tanh", mk.tanh_params(c_pk=4.7e-6, c_inf=0.5e-6, v0=6.0), valid=(0.0, 16.0),
                             part_id="BD-1002")
    else:
        orig = mk.make_curve("landau", {"C0_F": 4.7e-6, "V_k_V": 6.0, "C_p_F": 0.2e-6}, valid=(0.0, 16.0),
                             part_id="BD-1002")
    src = tmp_path / "in.json"
    orig.save(src)
    assert main(["library", "--library", str(lib.target), "add", str(src)]) == 0
    out = tmp_path / "out.json"
    assert main(["library", "--library", str(lib.target), "export", "BD-1002", "--format", "json", "--out", str(out)]) == 0
    back = Curve.load(out)
    V = np.linspace(0.0, 16.0, 97)
    np.testing.assert_allclose(back.C(V), orig.C(V), rtol=1e-12, atol=0)
    np.testing.assert_allclose(back.u_C(V), orig.u_C(V), rtol=1e-12, atol=0)
    assert back.valid_range_V == orig.valid_range_V and back.conditions == orig.conditions


def test_csv_round_trip_through_library(lib, mk, tmp_path):
    from benchkit.exports.table_csv import read_curve_csv

    orig = mk.make_curve()
    lib.add_curve(orig)
    out = tmp_path / "t.csv"
    assert main(["library", "--library", str(lib.target), "export", "BD-1001", "--format", "csv", "--out", str(out),
                 "--points", "33"]) == 0
    cols = read_curve_csv(out.read_text())
    np.testing.assert_allclose(cols["C_F"], orig.C(cols["bias_V"]), rtol=1e-12, atol=0)
    np.testing.assert_allclose(cols["u_C_F"], orig.u_C(cols["bias_V"]), rtol=1e-12, atol=0)


def test_export_folder_names_stay_inside(lib, mk, tmp_path):
    lib.add_part({"id": "../../etc/BD-1", "description": "path-like id", "nominal_C_F": 1e-6})
    lib.add_curve(mk.make_curve(part_id="../../etc/BD-1", sample_id="A"))
    lib.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=9e-6), part_id="../../etc/BD-1", sample_id="B"))
    out = tmp_path / "o"
    assert main(["library", "--library", str(lib.target), "export", "../../etc/BD-1", "--format", "spice",
                 "--out", str(out)]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert len(names) == 2 and all(n.startswith("etc_BD-1_c") and n.endswith(".lib") for n in names)
    beside = sorted(p.name for p in tmp_path.iterdir() if not p.name.startswith("lib.sqlite"))
    assert beside == ["o"]  # nothing written outside the folder asked for


def test_control_characters_refused_in_part_ids(lib):
    # a line break in an id would break one-line messages and listings: refused, nothing stored
    with pytest.raises(UserError, match="control characters"):
        lib.add_part({"id": "BD-1\nBD-2"})
    assert lib.summary()["part"] == 3
