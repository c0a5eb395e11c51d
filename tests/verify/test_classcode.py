"""Class-code check: C(0 V, T)/C(0 V, 25 degC) against the EIA-198 band of the code.

Sources: EIA-198 class-2 codes (X7R = -55..+125 degC, +-15 %; X5R = -55..+85 degC, +-15 %;
Y5V = -30..+85 degC, +22/-82 %) [standard: EIA-198]; decision rules ILAC-G8:09/2019 (simple
and guarded acceptance) and ISO 14253-1 (nonconformity proven only outside the band widened
by U). Temperature curves are invented for the tests.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchkit.catalogue.codes import parse_class_code
from benchkit.verify.classcode import check_class_code
from fits import Curve
from fits.family import CurveFamily


def family(changes_pct: dict[float, float], rel_u: float = 0.0, sample="S1"):
    curves = []
    for T, pct in changes_pct.items():
        f = 1.0 + pct / 100.0
        params = {"C_inf_F": 1.5e-6 * f, "C_pk_F": 10e-6 * f, "V0_V": 2.5, "V_off_V": 0.0}
        cov = np.diag([(rel_u * abs(v)) ** 2 for v in params.values()])
        curves.append(Curve("tanh", params, cov, (0.0, 10.0), conditions={"temp_C": T},
                            part_id="BD-1003", sample_id=sample, branch="rising"))
    return CurveFamily(curves)


HONEST = {-55.0: -11.0, 25.0: 0.0, 85.0: 2.5, 125.0: -8.0}
MISLABELLED = {-55.0: -11.0, 25.0: 0.0, 85.0: -6.0, 125.0: -24.0}


def test_an_honest_x7r_part_conforms_and_a_mislabelled_one_does_not():
    x7r = parse_class_code("X7R")
    ok = check_class_code(family(HONEST, rel_u=0.001), x7r)
    bad = check_class_code(family(MISLABELLED, rel_u=0.001), x7r)
    assert ok.verdict == "conforming" and ok.covered, ok.reason
    assert bad.verdict == "nonconforming"
    assert "at 125.0 degC" in bad.reason and "-15..+15 %" in bad.reason
    # the measured temperatures are decided as measured, the grid between them interpolated
    at = {p.temp_C: p for p in bad.points}
    assert at[125.0].measured and at[125.0].change_pct == pytest.approx(-24.0, abs=1e-9)
    assert not at[100.0].measured


def test_guarded_rule_leaves_a_change_within_U_of_the_edge_undecided_simple_accepts_it():
    # ILAC-G8 4.2.2 with w = U: -14.8 % +- about 0.6 % is neither proven in nor out of +-15 %
    near = {-55.0: -11.0, 25.0: 0.0, 85.0: 2.0, 125.0: -14.8}
    fam = family(near, rel_u=0.002)
    x7r = parse_class_code("X7R")
    guarded = check_class_code(fam, x7r)
    simple = check_class_code(fam, x7r, rule="simple")
    assert guarded.verdict == "not decidable" and "125" in guarded.reason
    assert simple.verdict == "conforming"
    p = {q.temp_C: q for q in guarded.points}[125.0]
    assert p.U_pct > 0.2 and p.decision.statement == "conditional pass"


def test_coverage_conformity_needs_the_whole_range_nonconformity_does_not():
    x7r = parse_class_code("X7R")
    short_ok = check_class_code(family({-55.0: -9.0, 25.0: 0.0, 85.0: 2.0}), x7r)
    assert short_ok.verdict == "not decidable" and "does not cover" in short_ok.reason
    short_bad = check_class_code(family({-55.0: -9.0, 25.0: 0.0, 85.0: -19.0}), x7r)
    assert short_bad.verdict == "nonconforming"
    # the same curve is conforming as X5R, whose range ends at +85 degC (EIA-198)
    assert check_class_code(family({-55.0: -9.0, 25.0: 0.0, 85.0: 2.0}),
                            parse_class_code("X5R")).verdict == "conforming"


def test_asymmetric_band_of_y5v():
    # Y5V: -30..+85 degC, +22/-82 %: a -60 % drop at 85 degC still conforms, +25 % does not
    y5v = parse_class_code("Y5V")
    assert check_class_code(family({-30.0: -40.0, 25.0: 0.0, 85.0: -60.0}), y5v).verdict == "conforming"
    assert check_class_code(family({-30.0: 25.0, 25.0: 0.0, 85.0: -60.0}), y5v).verdict == "nonconforming"


def test_without_a_reference_temperature_nothing_is_decided():
    res = check_class_code(family({60.0: 0.0, 125.0: -30.0}), parse_class_code("X7R"))
    assert res.verdict == "not decidable" and "reference 25 degC" in res.reason


# -- the command: exit codes as `benchkit verify` (DEVELOPERS.md, "Exit codes") -------------

def _cli(argv):
    from benchkit.cli import main

    return main(argv)


def test_class_check_command_exit_codes(tmp_path, capsys):
    honest = family(HONEST, rel_u=0.001).save(tmp_path / "honest.json")
    bad = family(MISLABELLED, rel_u=0.001, sample="S2").save(tmp_path / "bad.json")
    short = family({-55.0: -9.0, 25.0: 0.0, 85.0: 2.0}, sample="S3").save(tmp_path / "short.json")
    assert _cli(["class-check", str(honest), "--code", "X7R"]) == 0
    assert _cli(["class-check", str(bad), "--code", "X7R"]) == 1
    assert _cli(["class-check", str(short), "--code", "X7R"]) == 3
    out = tmp_path / "report.json"
    assert _cli(["class-check", str(honest), str(bad), "--code", "X7R", "--out", str(out)]) == 1
    text = capsys.readouterr().out
    assert "BD-1003 S2 rising: X7R nonconforming" in text and "part BD-1003 (X7R): nonconforming" in text
    import json
    doc = json.loads(out.read_text())
    assert [s["verdict"] for s in doc["samples"]] == ["conforming", "nonconforming"]
    # bad input: one line, exit 2, nothing written
    out2 = tmp_path / "never.json"
    assert _cli(["class-check", str(honest), "--code", "X9Q", "--out", str(out2)]) == 2
    assert _cli(["class-check", str(tmp_path / "missing.json"), "--code", "X7R"]) == 2
    assert not out2.exists()
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and all(e.startswith("benchkit: error: ") for e in err)
