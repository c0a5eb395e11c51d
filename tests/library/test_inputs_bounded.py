"""Files handed to `benchkit library add` are bounded like every other reader: an id with a
control character, a document nested a thousand deep or a file of many megabytes gets one
line and exit 2, and no library file is left behind (benchkit.bounded, the same limits as
the plan, parts and run readers)."""

from __future__ import annotations

import json

import pytest

from benchkit.bounded import MAX_FILE_CHARS
from benchkit.cli import main


def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip()
    assert err and "\n" not in err, err
    assert "Traceback" not in err
    return err


def _curve_doc(mk, tmp_path) -> dict:
    path = tmp_path / "c.json"
    mk.make_curve(part_id="BD-1001").save(path)
    return json.loads(path.read_text())


@pytest.mark.parametrize("field", ["part_id", "sample_id"])
def test_control_character_in_a_curve_id_is_refused(tmp_path, capsys, mk, field):
    # ESC [2J clears a terminal (ECMA-48 "erase in display"): an id must never carry it
    doc = _curve_doc(mk, tmp_path)
    doc[field] = "BD-1001\x1b[2J"
    src = tmp_path / "bad.json"
    src.write_text(json.dumps(doc))
    lib = tmp_path / "lab.sqlite"
    assert main(["library", "--library", str(lib), "add", str(src)]) == 2  # the part from the document
    err = _one_error_line(capsys)
    assert str(src) in err and field in err and "\\x1b" in err
    assert not lib.exists()


def test_a_curve_document_nested_1000_deep_is_refused(tmp_path, capsys):
    src = tmp_path / "deep.json"
    src.write_text('{"format": "benchkit-curve", "x": ' + "[" * 1000 + "]" * 1000 + "}")
    lib = tmp_path / "lab.sqlite"
    assert main(["library", "--library", str(lib), "add", str(src), "--part", "BD-1001"]) == 2
    assert str(src) in _one_error_line(capsys)
    assert not lib.exists()


def test_a_verification_report_nested_1000_deep_is_refused(tmp_path, capsys):
    src = tmp_path / "deep-report.json"
    src.write_text('{"format": "benchkit-verification", "x": ' + "[" * 5000 + "]" * 5000 + "}")
    lib = tmp_path / "lab.sqlite"
    assert main(["library", "--library", str(lib), "add", str(src)]) == 2
    assert str(src) in _one_error_line(capsys)
    assert not lib.exists()


def test_an_oversized_curve_file_is_refused(tmp_path, capsys):
    src = tmp_path / "big.json"
    src.write_text('{"pad": "' + "x" * (MAX_FILE_CHARS + 10) + '"}')
    lib = tmp_path / "lab.sqlite"
    assert main(["library", "--library", str(lib), "add", str(src), "--part", "BD-1001"]) == 2
    assert "characters" in _one_error_line(capsys)
    assert not lib.exists()
