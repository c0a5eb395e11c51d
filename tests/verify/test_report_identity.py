"""The report's identity block, its notation, its margins in words, the AC level comparison
and its plots.

Outside truths: every input's sha256 recomputed with hashlib (FIPS 180-4) from the file bytes;
the *IDN? strings and run ids as run.json recorded them; the SI prefixes of the SI Brochure
(9th ed., BIPM, table 7) to read the page's values back; the acceptance limits of guarded
acceptance, AL = TL -/+ U [standard: ILAC-G8:09/2019 4.2.2]; the measuring-voltage tolerance
1.0 +-0.2 Vrms [standard: IEC 60384-1 clause 4.2.2 as quoted in detail specifications, from
memory]; plain arithmetic of percentages for the margins.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import html
import json
import re
import shutil

import numpy as np
import pytest

from benchkit import __version__
from benchkit.catalogue.codes import parse_tolerance
from benchkit.cli import main
from benchkit.errors import EXIT_BAD_INPUT
from benchkit.verify import compare
from benchkit.verify.claims import load_claim
from benchkit.verify.measured import load_inputs
from benchkit.verify.report import cap, curves_figure, deviations_figure, pct, write_report

# SI Brochure, 9th ed., table 7 (the prefixes a component value uses)
SI = {"a": 1e-18, "f": 1e-15, "p": 1e-12, "n": 1e-9, "\u00b5": 1e-6, "m": 1e-3, "": 1.0}
CAP_CELL = re.compile(r"^(-?\d+(?:\.\d+)?) ([afpn\u00b5m]?)F$")
EXPONENT = re.compile(r"\d[eE][+-]?\d")
NOW = dt.datetime(2026, 1, 2, 3, 4, 5, tzinfo=dt.timezone.utc)


def sha256(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def visible_text(page: str) -> str:
    """The page without its inline images and tags, entities decoded."""
    page = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", page)
    page = re.sub(r"<style>.*?</style>", "", page, flags=re.S)
    return html.unescape(re.sub(r"<[^>]+>", " ", page))


def cells(page: str) -> list[str]:
    return [html.unescape(re.sub(r"<[^>]+>", "", c)).strip()
            for c in re.findall(r"<td[^>]*>(.*?)</td>", page, flags=re.S)]


@pytest.fixture(scope="module")
def claim_path(tools, tmp_path_factory, lot_truth):
    mean = np.mean(np.array(list(lot_truth.values())), axis=0)
    p = tmp_path_factory.mktemp("claim") / "typical.csv"
    p.write_text(tools.claim_text("BD-1004", tools.LOT_BIAS_V, [float(f"{c:.3g}") for c in mean]))
    return p


@pytest.fixture(scope="module")
def verification(claim_path, lot_samples):
    claim = load_claim(claim_path)
    return compare.verify(claim, *lot_samples, claim.tolerance, "guarded")


def test_identity_names_every_input_run_instrument_and_the_software(tmp_path, verification,
                                                                     claim_path, lot_run):
    h, j = write_report(verification, tmp_path / "r", inputs=[str(lot_run)], now=NOW)
    doc = json.loads(j.read_text())
    ident = doc["identity"]
    meta = json.loads((lot_run / "run.json").read_text())
    assert ident["report_utc"] == "2026-01-02T03:04:05Z"
    assert dt.datetime.fromisoformat(ident["report_utc"].replace("Z", "+00:00")) == NOW
    assert ident["software_version"] == __version__ and ident["software"] == f"benchkit {__version__}"
    assert ident["run_ids"] == [meta["run_id"]]
    assert ident["operator"] == "not recorded" and ident["operator_source"] is None
    # the input files with their sha256, recomputed here from the bytes
    got = {(f["role"], f["path"]): f["sha256"] for f in ident["inputs"]}
    assert got == {("claim", str(claim_path)): sha256(claim_path),
                   ("run.json", str(lot_run / "run.json")): sha256(lot_run / "run.json"),
                   ("points.csv", str(lot_run / "points.csv")): sha256(lot_run / "points.csv")}
    assert sha256(lot_run / "points.csv") == meta["points_sha256"]  # the run's own record agrees
    # the *IDN? answers as run.json recorded them, every instrument of the run
    idn = {i["role"]: i["idn"] for i in ident["runs"][0]["instruments"]}
    assert idn == {role: inst["idn"] for role, inst in meta["instruments"].items()}
    assert {"meter", "supply"} <= set(idn) and all(idn.values())
    # the same on the page
    text = visible_text(h.read_text())
    for value in [ident["report_id"], ident["report_utc"], meta["run_id"], f"benchkit {__version__}",
                  "not recorded", *idn.values(), *got.values()]:
        assert value in text, value


def test_identifiers_are_shown_verbatim_as_code(tmp_path, verification, lot_run):
    # a run id ends in random hex (runlog), e.g. "-15e8ab": read as prose it looks like a
    # number in e-notation; shown as code (like the hashes) it is an identifier, and the
    # engineering-notation check below sets code aside. Every place the run id is shown counts.
    h, _ = write_report(verification, tmp_path / "r", inputs=[str(lot_run)], now=NOW)
    page = h.read_text()
    run_id = json.loads((lot_run / "run.json").read_text())["run_id"]
    assert page.count(run_id) >= 2  # the list of run ids and its instruments row
    outside = re.sub(r"<code[^>]*>.*?</code>", "", page)
    assert run_id not in outside


def test_report_id_follows_the_content_not_the_date_or_the_folder(tmp_path, verification, lot_run,
                                                                  claim_path, lot_samples):
    _, j1 = write_report(verification, tmp_path / "a", inputs=[str(lot_run)], now=NOW)
    _, j2 = write_report(verification, tmp_path / "b", inputs=[str(lot_run)],
                         now=NOW + dt.timedelta(days=3))
    id1 = json.loads(j1.read_text())["identity"]["report_id"]
    i2 = json.loads(j2.read_text())["identity"]
    assert id1 == i2["report_id"] and i2["report_utc"] != "2026-01-02T03:04:05Z"
    assert re.fullmatch(r"[0-9a-f]{16}", id1)
    # the same files in another folder: the same id
    moved = tmp_path / "elsewhere"
    shutil.copytree(lot_run, moved / "run")
    shutil.copy(claim_path, moved / "claim.csv")
    claim2 = load_claim(moved / "claim.csv")
    v2 = compare.verify(claim2, *load_inputs([moved / "run"], "BD-1004"), claim2.tolerance, "guarded")
    _, j3 = write_report(v2, tmp_path / "c", inputs=[str(moved / "run")], now=NOW)
    assert json.loads(j3.read_text())["identity"]["report_id"] == id1
    # one byte more in the claim file (a blank line at the end): another id, same results
    with open(moved / "claim.csv", "a") as fh:
        fh.write("\n")
    claim3 = load_claim(moved / "claim.csv")
    v3 = compare.verify(claim3, *load_inputs([moved / "run"], "BD-1004"), claim3.tolerance, "guarded")
    _, j4 = write_report(v3, tmp_path / "d", inputs=[str(moved / "run")], now=NOW)
    assert json.loads(j4.read_text())["identity"]["report_id"] != id1
    # another operator: another id
    _, j5 = write_report(verification, tmp_path / "e", inputs=[str(lot_run)], operator="A. Tester", now=NOW)
    assert json.loads(j5.read_text())["identity"]["report_id"] != id1


def test_operator_from_the_option_or_run_json_else_not_recorded(tmp_path, lot_run, claim_path, capsys):
    run = tmp_path / "run"
    shutil.copytree(lot_run, run)
    meta = json.loads((run / "run.json").read_text())
    meta["operator"] = "B. Bench"
    (run / "run.json").write_text(json.dumps(meta))
    assert main(["verify", "--claim", str(claim_path), str(run), "--out", str(tmp_path / "r1")]) == 0
    ident = json.loads((tmp_path / "r1" / "report.json").read_text())["identity"]
    assert (ident["operator"], ident["operator_source"]) == ("B. Bench", "recorded in run.json")
    assert main(["verify", "--claim", str(claim_path), str(run), "--out", str(tmp_path / "r2"),
                 "--operator", "A. Tester"]) == 0
    ident = json.loads((tmp_path / "r2" / "report.json").read_text())["identity"]
    assert (ident["operator"], ident["operator_source"]) == ("A. Tester", "given with --operator")
    assert f"report id: {ident['report_id']}" in capsys.readouterr().out.splitlines()
    assert "A. Tester (given with --operator)" in visible_text((tmp_path / "r2" / "report.html").read_text())
    capsys.readouterr()
    # bad input: one line, exit 2, nothing written
    code = main(["verify", "--claim", str(claim_path), str(run), "--out", str(tmp_path / "r3"),
                 "--operator", "A.\x1b[2J Tester"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == EXIT_BAD_INPUT and len(err) == 1 and "operator" in err[0] and "control character" in err[0]
    assert not (tmp_path / "r3").exists()


def test_page_uses_engineering_notation_throughout(tmp_path, verification, lot_run):
    h, j = write_report(verification, tmp_path / "r", inputs=[str(lot_run)], now=NOW)
    page = h.read_text()
    text = visible_text(page)
    numbers = visible_text(re.sub(r"<code[^>]*>.*?</code>", "", page))  # hashes and ids aside
    assert not EXPONENT.search(numbers), EXPONENT.search(numbers)  # no 2.7e-05 on the page
    assert "uF" not in text and "degC" not in text  # one unit spelling: µF, °C
    doc = json.loads(j.read_text())
    # every capacitance cell reads back (SI prefixes) to the JSON value within its 4 digits
    s0 = doc["samples"][0]
    want = []
    for p in s0["points"]:
        d = p["decision"]
        want += [p["claimed_F"], d["tol_lo"], d["tol_hi"], p["measured_F"]]
    got = [c for c in cells(page) if CAP_CELL.match(c)]
    read = []
    for c in got:
        m = CAP_CELL.match(c)
        read.append(float(m.group(1)) * SI[m.group(2)])
    for value in want:
        assert any(abs(r - value) <= 5e-4 * abs(value) for r in read), value
    # ratios as percentages, two decimals, signed deviations
    for p in s0["points"]:
        assert f"{p['deviation_pct']:+.2f} %" in text


@pytest.mark.parametrize("value,text", [
    (27e-6, "27 \u00b5F"), (8.5788e-7, "857.9 nF"), (2.7e-11, "27 pF"), (1e-6, "1 \u00b5F"),
    (4.7e-9, "4.7 nF"), (None, "\u2013"), (float("nan"), "\u2013"),
])
def test_capacitance_cells(value, text):
    assert cap(value) == text  # SI Brochure table 7 prefixes, four significant digits


def test_percent_cells():
    assert pct(85.788) == "85.79 %" and pct(-1.234, signed=True) == "-1.23 %"
    assert pct(0.5, signed=True) == "+0.50 %" and pct(None) == "\u2013"


def _table_curve_case(tmp_path, tools, factor, tolerance="+-20%"):
    """A claim and a table curve (PCHIP through the points) at factor x the claim: the
    deviation at every claimed bias is exactly factor - 1."""
    from fits import Curve

    bias = np.array([0.0, 5.0, 10.0, 15.0, 20.0, 25.0])
    claimed = 1e-6 / (1.0 + (bias / 12.0) ** 2)
    claim = tmp_path / "claim.csv"
    claim.write_text(tools.claim_text("BD-1004", bias, claimed, tolerance=tolerance, age_h=1000))
    curve = tmp_path / "S1.json"
    Curve.from_points(bias, claimed * factor, origin="measured", part_id="BD-1004", sample_id="S1",
                      conditions={"freq_Hz": 1000.0, "ac_level_Vrms": 0.95, "temp_C": 25.0,
                                  "age_h": 1000.0}).save(curve)
    return claim, curve


def test_margin_in_plain_words_inside(tmp_path, tools):
    claim, curve = _table_curve_case(tmp_path, tools, 0.958)
    code = main(["verify", str(curve), "--claim", str(claim), "--out", str(tmp_path / "r"), "--rule", "simple"])
    assert code == 0
    doc = json.loads((tmp_path / "r" / "report.json").read_text())
    m = doc["samples"][0]["worst_margin"]
    # 4.2 % below a +-20 % band: 20 - 4.2 = 15.8 % of the claim left to the lower limit
    assert m["deviation_pct"] == pytest.approx(-4.2, abs=1e-9)
    assert m["margin_pct"] == pytest.approx(15.8, abs=1e-9) and m["limit"] == "lower"
    text = visible_text((tmp_path / "r" / "report.html").read_text())
    assert "4.2 % below the claimed" in text and "the tolerance allows 20 % either way" in text
    assert "15.8 % of the claim inside the tolerance limit (lower limit" in text
    assert "of the way" not in text


def test_margin_in_plain_words_outside_and_asymmetric(tmp_path, tools):
    claim, curve = _table_curve_case(tmp_path, tools, 0.75, tolerance="+80/-20%")
    code = main(["verify", str(curve), "--claim", str(claim), "--out", str(tmp_path / "r"), "--rule", "simple"])
    assert code == 1
    text = visible_text((tmp_path / "r" / "report.html").read_text())
    # 25 % below against 20 % allowed below: 5 % of the claim beyond the lower limit
    assert "25 % below the claimed" in text and "allows 20 % below and 80 % above" in text
    assert "5 % of the claim outside the tolerance limit (lower limit" in text


def test_ac_level_across_the_part_beside_the_claims(tmp_path, tools, lot_run, claim_path):
    import csv

    samples, skipped = load_inputs([lot_run], "BD-1004")
    claim = load_claim(claim_path)
    v = compare.verify(claim, samples, skipped, claim.tolerance, "guarded")
    rows = list(csv.DictReader(open(lot_run / "points.csv", newline="")))
    for s in v.samples:
        levels = [float(r["ac_level_dut_Vrms"]) for r in rows
                  if r["sample_id"] == s.sample.sample_id and r["branch"] == "rising"]
        a = s.ac_level
        assert s.sample.conditions["points_dropped"] == 0
        assert (a["min_Vrms"], a["max_Vrms"]) == (min(levels), max(levels))
        assert a["claim_Vrms"] == 1.0 and a["tolerance_Vrms"] == pytest.approx(0.2)
        inside = all(abs(x - 1.0) <= 0.2 for x in levels)  # IEC 60384-1 4.2.2: 1.0 +-0.2 Vrms
        assert a["within_tolerance"] is inside
    h, _ = write_report(v, tmp_path / "r", inputs=[str(lot_run)], now=NOW)
    text = visible_text(h.read_text())
    a = v.samples[0].ac_level
    assert f"{a['min_Vrms']:.3g}\u2013{a['max_Vrms']:.3g} Vrms across the part" in text
    assert "against the claim's 1 Vrms" in text and "\u00b10.2 Vrms" in text


def test_ac_level_beyond_the_tolerance_is_noted(tmp_path, tools):
    # write_run records 0.85 x the set level across the part: 0.9 V set -> 0.765 Vrms,
    # 23.5 % below the claim's 1 Vrms, beyond the +-0.2 Vrms of IEC 60384-1 4.2.2 (as quoted)
    bias = np.linspace(0.0, 25.0, 11)
    run = tools.write_run(tmp_path / "run", [("S1", "BD-1004", 1, tools.part_dict(),
                                               lambda v: 1e-6 / (1 + (v / 12.0) ** 2))],
                          bias, ac_level_Vrms=0.9)
    claim = tmp_path / "claim.csv"
    claim.write_text(tools.claim_text("BD-1004", bias, 1e-6 / (1 + (bias / 12.0) ** 2)))
    code = main(["verify", str(run), "--claim", str(claim), "--out", str(tmp_path / "r")])
    assert code == 3  # measured at another level: not decidable without the override
    doc = json.loads((tmp_path / "r" / "report.json").read_text())
    a = doc["samples"][0]["ac_level_check"]
    assert a["within_tolerance"] is False and a["mean_Vrms"] == pytest.approx(0.765)
    text = visible_text((tmp_path / "r" / "report.html").read_text())
    assert "0.765 Vrms across the part" in text and "23.5 % below the claim's 1 Vrms" in text
    assert "NOTE: beyond the tolerance of \u00b10.2 Vrms" in text


def _overlaps(fig):
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    ax = fig.axes[0]
    return ax.get_legend().get_window_extent(r).overlaps(ax.get_window_extent(r))


def test_legends_stand_beside_the_data(verification):
    for make in (curves_figure, deviations_figure):
        assert not _overlaps(make(verification)), make.__name__


def _al_markers(fig):
    ax = fig.axes[0]
    return [ln for ln in ax.get_lines() if ln.get_marker() in ("^", "v")]


def test_acceptance_limits_drawn_only_where_they_leave_the_tolerance_line(claim_path, lot_samples):
    claim = load_claim(claim_path)
    # meter accuracy 0.1 %: U about 0.5 % against a +-15 % band, the limits would sit on the lines
    v = compare.verify(claim, *lot_samples, claim.tolerance, "guarded")
    fig = deviations_figure(v)
    n_points = sum(p.measured_F is not None for s in v.samples for p in s.points)
    assert not _al_markers(fig) and fig.al_hidden == 2 * n_points
    assert "not drawn: see the tables" in fig.axes[0].get_title()
    # meter accuracy 5 %: U about 6 %, well off the lines: drawn, at TL -/+ U (ILAC-G8 4.2.2)
    v = compare.verify(claim, *lot_samples, claim.tolerance, "guarded", meter_accuracy_pct=5.0)
    fig = deviations_figure(v)
    marks = _al_markers(fig)
    assert fig.al_hidden == 0 and len(marks) == 2 * n_points
    ys = sorted(float(ln.get_ydata()[0]) for ln in marks)
    want = []
    lo, hi = claim.limits(claim.bias_V, parse_tolerance("15%"))
    for s in v.samples:
        for j, p in enumerate(s.points):
            if p.measured_F is not None:
                U = p.budget.U
                want += [100 * ((lo[j] + U) / p.claimed_F - 1), 100 * ((hi[j] - U) / p.claimed_F - 1)]
    assert np.allclose(ys, sorted(want), rtol=0, atol=1e-9)
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "acceptance limits (TL moved in by U)" in labels
    # simple acceptance: AL = TL, nothing to draw and nothing hidden
    v = compare.verify(claim, *lot_samples, claim.tolerance, "simple", meter_accuracy_pct=5.0)
    fig = deviations_figure(v)
    assert not _al_markers(fig) and fig.al_hidden == 0
