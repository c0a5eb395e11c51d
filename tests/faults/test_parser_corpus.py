"""A corpus of malformed files for every parser, each refused with its expected message.

Layout: tests/faults/corpus/<parser>/<case>.<ext> with <case>.expect beside it holding the
fragment the one-line message must carry (a fragment starting with ':' must follow the file
name directly, as 'file:line: ...'). Files starting with '_' are the good companions a case
needs (the run.json beside a bad points.csv, and the other way round). The corpora of other
test folders are reused as they are (tests/catalogue/malformed_parts, tests/verify/malformed_claims;
their own tests hold their expected messages): here they must pass the same rules through the
command line, one line, exit 2, nothing written.

The rule checked [benchkit/errors.py, the project brief]: bad input gets one clear line (what,
where: file and line or field, what to do) and exit 2, and nothing is written.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

from benchkit.sweep.benchfile import load_bench
from benchkit.cli import main
from benchkit.errors import UserError
from benchkit.sweep.plan import load_plan
from benchkit.verify.claims import load_claim
from benchkit.catalogue import DEMO_PARTS, PartsFileError, load_fixture, load_lot, load_parts

from fault_kit import PARTS

HERE = Path(__file__).resolve().parent
CORPUS = HERE / "corpus"
REUSED_PARTS = HERE.parent / "catalogue" / "malformed_parts"
REUSED_CLAIMS = HERE.parent / "verify" / "malformed_claims"
PARSERS = ("plan", "bench", "curve", "points", "run_json", "library", "parts", "claims")
# Known open parser bugs, as strict xfails: a fix shows as XPASS, so the mark gets removed. fits/ raises, benchkit/library/fitsbridge.py words it for the command line.
FITS_OPEN = {
}
LIBRARY_OPEN = {
}


def cases(parser: str) -> list[Path]:
    return sorted(p for p in (CORPUS / parser).iterdir()
                  if p.suffix != ".expect" and not p.name.startswith("_"))


def expected(path: Path) -> str:
    return path.with_suffix(".expect").read_text(encoding="utf-8").strip()


def params(parser: str, open_bugs: dict[str, str] = FITS_OPEN):
    out = []
    for p in cases(parser):
        key = f"{parser}/{p.name}"
        marks = [pytest.mark.xfail(strict=True, reason=open_bugs[key])] if key in open_bugs else []
        out.append(pytest.param(p, id=p.name, marks=marks))
    return out


def check_message(msg: str, path: Path, fragment: str) -> None:
    assert "\n" not in msg.strip(), msg
    if fragment.startswith(":"):
        assert msg.startswith(f"{path}{fragment}"), msg
    else:
        assert msg.startswith(f"{path}: ") and fragment in msg, msg


def one_error_line(capsys) -> str:
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("benchkit: error: "), captured.err
    return lines[0][len("benchkit: error: "):]


def snapshot(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_every_case_has_its_expected_message():
    for parser in PARSERS:
        files = cases(parser)
        assert files, parser
        for p in files:
            assert p.with_suffix(".expect").is_file(), f"{p} has no .expect"
            assert expected(p), f"{p.with_suffix('.expect')} is empty"
        stray = [e for e in (CORPUS / parser).glob("*.expect")
                 if not any(c.with_suffix(".expect") == e for c in files)]
        assert stray == []


# -- plans, bench files: benchkit parsers, UserError ---------------------------------------


@pytest.mark.parametrize("path", params("plan"))
def test_plan(path):
    with pytest.raises(UserError) as info:
        load_plan(path, PARTS)
    check_message(str(info.value), path, expected(path))


@pytest.mark.parametrize("path", params("plan"))
def test_plan_on_the_command_line_writes_nothing(path, tmp_path, capsys):
    out = tmp_path / "run"
    code = main(["measure", "--sim", "--virtual-clock", "--plan", str(path), "--out", str(out)])
    assert code == 2 and not out.exists()
    check_message(one_error_line(capsys), path, expected(path))


@pytest.mark.parametrize("path", params("bench"))
def test_bench_file(path):
    with pytest.raises(UserError) as info:
        load_bench(path)
    check_message(str(info.value), path, expected(path))


# -- curve documents: fits raises CurveDocumentError; benchkit makes it one line -----------


@pytest.mark.parametrize("path", params("curve"))
def test_curve_document(path):
    from fits import Curve, CurveDocumentError

    with pytest.raises(CurveDocumentError) as info:
        Curve.load(path)
    check_message(str(info.value), path, expected(path))


@pytest.mark.parametrize("path", params("curve", LIBRARY_OPEN))
def test_curve_document_on_the_command_line_writes_nothing(path, tmp_path, capsys):
    # benchkit reads the JSON itself (benchkit.library.fitsbridge) and words that part its own
    # way; a field named by fits must be named on the command line too
    out = tmp_path / "x.csv"
    assert main(["export", str(path), "--format", "csv", "--out", str(out)]) == 2
    msg = one_error_line(capsys)
    assert msg.startswith(f"{path}: "), msg
    field = re.search(r"field '([^']+)'", expected(path))
    if field:
        assert f"field '{field.group(1)}'" in msg, msg
    assert not out.exists()


def test_curve_document_message_names_the_file_once(tmp_path, capsys):
    path = CORPUS / "curve" / "range_reversed.json"
    assert main(["export", str(path), "--format", "csv", "--out", str(tmp_path / "x.csv")]) == 2
    assert one_error_line(capsys).count(str(path)) == 1


# -- run directories: points.csv and run.json as `benchkit fit` reads them -----------------


def run_dir(tmp_path: Path, bad: Path, bad_name: str, good: Path, good_name: str) -> Path:
    d = tmp_path / "run"
    d.mkdir()
    shutil.copy(good, d / good_name)
    shutil.copy(bad, d / bad_name)
    return d


@pytest.mark.parametrize("path", params("points"))
def test_points_csv(path, tmp_path, capsys):
    d = run_dir(tmp_path, path, "points.csv", CORPUS / "points" / "_base_run.json", "run.json")
    before = snapshot(d)
    assert main(["fit", str(d), "--out", str(tmp_path / "c.json")]) == 2
    check_message(one_error_line(capsys), d / expected(path).split(":")[0], ":" + expected(path).split(":", 1)[1])
    assert snapshot(d) == before and not (tmp_path / "c.json").exists()


@pytest.mark.parametrize("path", params("run_json"))
def test_run_json(path, tmp_path, capsys):
    d = run_dir(tmp_path, path, "run.json", CORPUS / "run_json" / "_base_points.csv", "points.csv")
    before = snapshot(d)
    assert main(["fit", str(d), "--out", str(tmp_path / "c.json")]) == 2
    check_message(one_error_line(capsys), d / "run.json", ":" + expected(path).split(":", 1)[1])
    assert snapshot(d) == before and not (tmp_path / "c.json").exists()


def test_the_good_companions_are_good(tmp_path, capsys):
    d = run_dir(tmp_path, CORPUS / "run_json" / "_base_points.csv", "points.csv",
                CORPUS / "points" / "_base_run.json", "run.json")
    # five points: enough for the table model (PCHIP through the points), not for a shape fit
    assert main(["fit", str(d), "--out", str(tmp_path / "c.json"), "--model", "table"]) == 0
    assert (tmp_path / "c.json").is_file()


# -- library files ---------------------------------------------------------------------------


@pytest.mark.parametrize("path", params("library"))
def test_library_file(path, tmp_path, capsys):
    lib = tmp_path / path.name
    shutil.copy(path, lib)
    assert main(["library", "list", "--library", str(lib)]) == 2
    check_message(one_error_line(capsys), lib, expected(path))
    assert lib.read_bytes() == path.read_bytes() and sorted(tmp_path.iterdir()) == [lib]
    # merging it into a good library refuses it too, and changes neither
    mine = tmp_path / "mine.sqlite"
    assert main(["library", "add-parts", str(DEMO_PARTS), "--library", str(mine)]) == 0
    capsys.readouterr()
    kept = mine.read_bytes()
    assert main(["library", "import", str(lib), "--library", str(mine)]) == 2
    check_message(one_error_line(capsys), lib, expected(path))
    assert lib.read_bytes() == path.read_bytes() and mine.read_bytes() == kept


# -- parts, fixture and lot files ------------------------------------------------------------


def parts_loader(path: Path):
    if path.name.startswith("fixture"):
        return lambda p: load_fixture(p, load_parts(DEMO_PARTS))
    if path.name.startswith("lot"):
        return lambda p: load_lot(p, load_parts(DEMO_PARTS))
    return load_parts


@pytest.mark.parametrize("path", params("parts"))
def test_parts_file(path):
    with pytest.raises(PartsFileError) as info:
        parts_loader(path)(path)
    check_message(str(info.value), path, expected(path))


@pytest.mark.parametrize("path", [*cases("parts"), *sorted(REUSED_PARTS.glob("*.toml"))],
                         ids=lambda p: f"{p.parent.name}/{p.name}")
def test_parts_file_on_the_command_line_writes_nothing(path, tmp_path, tmp_path_factory, capsys):
    if path.name.startswith(("fixture", "lot")):
        argv = ["sim", "--lot" if path.name.startswith("lot") else "--virtual-clock", "--fixture", str(path)]
        argv += ["--bench-file", str(tmp_path / "bench.toml")]
    elif path.name.startswith("sim_"):
        # the [part.sim] physics is the simulator's to read: the command that starts one refuses
        fixture = tmp_path_factory.mktemp("fixture") / "fixture.toml"
        fixture.write_text('[[channel]]\nchannel = 1\nsample_id = "S-1"\npart_id = "BD-9001"\n')
        argv = ["sim", "--virtual-clock", "--parts", str(path), "--fixture", str(fixture),
                "--bench-file", str(tmp_path / "bench.toml")]
    else:
        argv = ["library", "add-parts", str(path), "--library", str(tmp_path / "lib.sqlite")]
    assert main(argv) == 2
    msg = one_error_line(capsys)
    assert msg.startswith(f"{path}: ") or msg.startswith(f"{path}:"), msg
    assert list(tmp_path.iterdir()) == []


# -- supplier claims -------------------------------------------------------------------------


@pytest.mark.parametrize("path", params("claims"))
def test_claim_file(path):
    with pytest.raises(UserError) as info:
        load_claim(path)
    check_message(str(info.value), path, expected(path))


@pytest.mark.parametrize("path", [*cases("claims"), *sorted(REUSED_CLAIMS.glob("*.csv"))],
                         ids=lambda p: f"{p.parent.name}/{p.name}")
def test_claim_on_the_command_line_writes_nothing(path, tmp_path, capsys):
    from fits import Curve

    curve = tmp_path / "c.json"
    Curve.from_points([0.0, 10.0, 25.0], [1e-6, 0.8e-6, 0.4e-6], part_id="BD-1004").save(curve)
    out = tmp_path / "report"
    assert main(["verify", str(curve), "--claim", str(path), "--out", str(out)]) == 2
    msg = one_error_line(capsys)
    assert msg.startswith(f"{path}:"), msg
    assert not out.exists()


# -- values on the command line ------------------------------------------------------------


@pytest.mark.parametrize("argv, words", [
    (["measure", "--sim", "--virtual-clock", "--plan", "{plan}", "--out", "{out}", "--io-timeout-s", "-1"],
     "--io-timeout-s must be a positive number"),
    (["measure", "--sim", "--virtual-clock", "--plan", "{plan}", "--out", "{out}", "--io-timeout-s", "abc"],
     "argument --io-timeout-s: invalid float value: 'abc'"),
    (["measure", "--sim", "--virtual-clock", "--plan", "{plan}", "--out", "{out}", "--seed", "x"],
     "argument --seed: invalid int value: 'x'"),
    (["measure", "--sim", "--virtual-clock", "--clock-speed", "0", "--plan", "{plan}", "--out", "{out}"],
     "--clock-speed K needs --virtual-clock and K > 0"),
    (["measure", "--sim", "--plan", "{plan}", "--out", "{out}", "--parts", "{out}/none.toml"],
     "none.toml: file not found"),
    (["sim", "--port", "-5"], "--port -5: use 0 (free ports) or a base port"),
    (["library", "query", "--library", "{out}.sqlite", "--bias", "12q"], "--bias '12q': not an engineering value"),
    (["library", "query", "--library", "{out}.sqlite", "--bias", "1,5"], "a comma is not a decimal marker"),
    (["fit", "{out}", "--out", "{out}.json", "--model", "spline9"], "argument --model: invalid choice: 'spline9'"),
    (["export", "{out}.json", "--format", "csv", "--out", "{out}.csv", "--esr", "4u7"],
     "'u' is an RKM capacitance letter, not a resistance one"),
])
def test_bad_command_line_value(argv, words, tmp_path, capsys):
    plan = CORPUS / "plan" / "_good.toml"
    out = tmp_path / "out"
    argv = [a.format(plan=plan, out=out) for a in argv]
    assert main(argv) == 2
    assert words in one_error_line(capsys)
    assert list(tmp_path.iterdir()) == []
