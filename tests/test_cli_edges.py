"""The command line at its edges: values as people type them, where results and notes go,
--json, the portable run lock, one atomic writer, no plotting-backend switch in library code."""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from benchkit.cli import build_parser, main
from benchkit.errors import UserError
from benchkit.sweep.progress import Progress
from benchkit.units import parse_count, parse_value

ROOT = Path(__file__).resolve().parents[1]


# -- values as typed -------------------------------------------------------------------------

@pytest.mark.parametrize("text, unit, value", [
    ("12v", "V", 12.0), ("12 V", "V", 12.0), ("-5V", "V", -5.0),
    ("4.7uf", "F", 4.7e-6), ("100nf", "F", 100e-9), ("4u7", "F", 4.7e-6),
    ("1khz", "Hz", 1000.0), ("0.5vrms", "Vrms", 0.5),
    ("85C", "degC", 85.0), ("-40C", "degC", -40.0), ("25.5 \u00b0C", "degC", 25.5),
    # SI prefixes (SI Brochure, 9th ed., table 7): a lone lower-case f after a number is femto
    ("10f", "F", 10e-15),
])
def test_values_written_as_people_type_them(text, unit, value):
    assert parse_value(text, unit, "--x") == pytest.approx(value, rel=1e-12)


def test_a_temperature_takes_no_prefix():
    with pytest.raises(UserError):
        parse_value("85kC", "degC", "--temp")


def test_counts_take_prefixes_and_stay_whole():
    assert [parse_count(t) for t in ("2000", "10k", "1.5k")] == [2000, 10000, 1500]
    for bad in ("10.5", "-3", "many"):
        with pytest.raises(UserError):
            parse_count(bad, "--lot-size")


def test_negative_values_with_a_unit_are_values_not_options():
    args = build_parser().parse_args(["budget", "BD-1001", "--bias", "-5V", "--temp", "-40C"])
    assert (args.bias, args.temp) == (-5.0, -40.0)


def test_class_code_in_any_case_and_a_typo_refused(capsys):
    args = build_parser().parse_args(["library", "query", "--bias", "5", "--class", "x7r"])
    assert args.class_code == "X7R"
    assert main(["library", "query", "--bias", "5", "--class", "X7Q"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("benchkit: error: argument --class") and "EIA-198" in err


@pytest.mark.parametrize("argv", [
    ["library", "query", "--bias", "5", "--min", "4.7"],  # 4.7 F: the u was forgotten
    ["budget", "BD-1001", "--bias", "5", "--need", "10"],
])
def test_a_capacitance_no_ceramic_part_has_is_refused_with_the_prefix_hint(argv, capsys, tmp_path):
    assert main(argv + ["--library", str(tmp_path / "none.sqlite")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "is a prefix missing?" in err[0] and ("write 4.7u for 4.7 uF" in err[0]
                                                                   or "write 10u for 10 uF" in err[0])
    assert list(tmp_path.iterdir()) == []


def test_lot_size_with_a_prefix_and_json_on_stdout_notes_on_stderr(capsys):
    # ISO 2859-1 level II, lot 1201-3200: code letter K, n = 125; AQL 1.0: Ac 3 / Re 4
    # [standard: ISO 2859-1 Tables 1 and 2-A]
    assert main(["lot", "sample-size", "--lot-size", "2k", "--aql", "1.0", "--json"]) == 0
    captured = capsys.readouterr()
    doc = json.loads(captured.out)
    assert (doc["lot_size"], doc["letter"], doc["n"], doc["Ac"], doc["Re"]) == (2000, "K", 125, 3, 4)
    assert "from memory" in captured.err and "from memory" not in captured.out
    assert main(["lot", "table", "--json"]) == 0
    tables = json.loads(capsys.readouterr().out)
    k = next(r for r in tables["normal_single"] if r["letter"] == "K")
    assert k["n"] == 125 and k["Ac_Re_by_aql_pct"]["1"] == "3/4"


# -- errors and bare benchkit ----------------------------------------------------------------

def test_an_error_names_the_program_once(capsys):
    assert main(["library", "query", "--bias", "12q"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("benchkit: error: argument --bias") and err.count("benchkit:") == 1
    assert "benchkit library query --help" in err  # the sub-command, where the operator acts


def test_bare_benchkit_prints_usage_to_stderr_and_exits_2(capsys):
    assert main([]) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and "usage: benchkit" in captured.err


def test_the_cli_builds_without_fcntl():
    """A Windows lab PC has no fcntl: building the parser (every command) must not need it."""
    code = "import sys; sys.modules['fcntl'] = None\nfrom benchkit.cli import build_parser\nbuild_parser()"
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr


# -- the run lock works across processes (filelock: flock on Linux) --------------------------

def test_a_second_process_cannot_write_a_run_that_is_being_written(tmp_path):
    from benchkit.sweep.runlog import RunLog

    d = tmp_path / "run"
    log = RunLog.create(d, {"format": "benchkit-run", "version": 1, "run_id": "r1", "status": "running"})
    try:
        code = textwrap.dedent(f"""
            from benchkit.errors import UserError
            from benchkit.sweep.runlog import RunLog
            try:
                RunLog.reopen({str(d)!r})
            except UserError as exc:
                print(exc)
        """)
        r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
        assert "another benchkit process is writing this run" in r.stdout, r.stdout + r.stderr
    finally:
        log.close()
    RunLog.reopen(d).close()  # free again once the writer closed


# -- one atomic writer, one file mode --------------------------------------------------------

def test_curve_documents_and_exports_get_the_same_file_mode(tmp_path):
    from benchkit.atomic import write_text_atomic
    from fits import Curve
    from fits._atomic import FILE_MODE

    old = os.umask(0o022)
    try:
        # what a plain open() gives under umask 022 is 0644 (POSIX open(2), common practice)
        assert FILE_MODE == 0o666 & ~os.umask(0o022)
        Curve.from_points([0.0, 2.0, 4.0], [10e-6, 8e-6, 5e-6]).save(tmp_path / "c.json")
        write_text_atomic(tmp_path / "e.csv", "x\n")
    finally:
        os.umask(old)
    modes = {p.name: p.stat().st_mode & 0o777 for p in tmp_path.iterdir()}
    assert modes["c.json"] == modes["e.csv"] == FILE_MODE


# -- no backend switch in library code -------------------------------------------------------

def test_library_code_never_chooses_a_matplotlib_backend():
    offenders = []
    for package in ("benchkit", "fits", "instruments"):
        for path in (ROOT / package).rglob("*.py"):
            text = path.read_text(encoding="utf-8")
            if "matplotlib.use(" in text or "import matplotlib.pyplot" in text or "pyplot" in text.replace(
                    "no pyplot", ""):
                offenders.append(str(path.relative_to(ROOT)))
    assert offenders == []


def test_plotting_leaves_the_callers_backend_alone(tmp_path):
    code = textwrap.dedent(f"""
        import matplotlib
        matplotlib.use("svg")
        from fits import Curve
        from fits.plots import new_figure, plot_curve, save_figure
        from benchkit.library.plot import plot_part
        from benchkit.library.records import PartRecord
        c = Curve.from_points([0.0, 2.0, 4.0], [10e-6, 8e-6, 5e-6])
        fig, (ax,) = new_figure()
        plot_curve(c, ax=ax)
        save_figure(fig, {str(tmp_path / 'a.png')!r})
        print(matplotlib.get_backend())
    """)
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip() == "svg"


# -- claims: the stdlib csv reader -----------------------------------------------------------

def test_a_claim_with_quoted_cells_reads(tmp_path):
    from benchkit.verify.claims import parse_claim

    text = ("# format = benchkit-claim\n# version = 1\n# part_id = BD-1004\n# freq_Hz = 1000\n"
            "# ac_level_Vrms = 1.0\n# tolerance = 10%\n"
            '"bias_V","C_uF"\n"0","1.0"\n"5","0.96"\n10,"0.83"\n')
    claim = parse_claim(text, "c.csv")
    assert list(claim.C_F) == pytest.approx([1.0e-6, 0.96e-6, 0.83e-6])
    with pytest.raises(UserError, match=r"c.csv:11: not a CSV row"):
        parse_claim(text + '15,"0.7\n', "c.csv")


# -- progress without a terminal -------------------------------------------------------------

def test_progress_without_a_terminal_is_compact():
    out = io.StringIO()
    p = Progress(stream=out, wall=lambda: 0.0)
    p.start(350)
    for i in range(1, 351):
        p.point(i, f"FX-01 rising +{i} V: C = 8.881 uF")
    p.finish("complete")
    lines = [ln for ln in out.getvalue().splitlines() if ln.startswith("point ")]
    assert len(lines) == 10 and lines[-1].startswith("point 350/350 (100%)")
    assert lines[0].startswith("point 35/350 (10%)")


def test_verify_says_why_a_sample_is_not_decidable_and_its_worst_point(tmp_path, capsys):
    from fits import Curve

    curve = tmp_path / "c.json"
    Curve.from_points([0.0, 5.0, 10.0], [1.0e-6, 0.96e-6, 0.83e-6], origin="measured", part_id="BD-1004",
                      sample_id="S1").save(curve)
    claim = ROOT / "data" / "claims" / "BD-1004-typical.csv"  # to 25 V; the curve stops at 10 V
    code = main(["verify", str(curve), "--claim", str(claim), "--out", str(tmp_path / "r"),
                 "--measured-age-h", "1000"])
    out = capsys.readouterr().out
    assert code == 3, out
    assert "worst point" in out and "of the claim inside the tolerance limit" in out
    assert "not decidable at 12.5, 15, 17.5, 20, 22.5, 25 V: outside the measured range 0..10 V" in out
