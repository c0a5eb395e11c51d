"""Claim files: strict parsing (one line with file and line), PCHIP interpolation, no
extrapolation."""

from pathlib import Path

import numpy as np
import pytest
from scipy.interpolate import PchipInterpolator

from benchkit.errors import UserError
from benchkit.verify.claims import load_claim, parse_claim

HERE = Path(__file__).parent
MALFORMED = HERE / "malformed_claims"
DATA = Path(__file__).resolve().parents[2] / "data" / "claims"

# file -> (line the message must name, words it must contain)
EXPECTED = {
    "wrong_units_column.csv": (7, "C_mF"),
    "wrong_units_bias.csv": (7, "bias_mV"),
    "wrong_units_header.csv": (4, "freq_Hz"),
    "wrong_units_value.csv": (4, "in Hz"),
    "non_monotonic.csv": (10, "strictly increasing"),
    "duplicate_bias.csv": (10, "duplicate bias 5 V (also at line 9)"),
    "duplicate_bias_late.csv": (11, "duplicate bias 5 V (also at line 9)"),
    "nan_value.csv": (9, "finite number"),
    "nan_bias.csv": (9, "finite number"),
    "too_few_points.csv": (9, "at least 3"),
    "no_header.csv": (1, "not a claim file"),
}


def test_corpus_is_complete():
    assert sorted(p.name for p in MALFORMED.glob("*.csv")) == sorted(EXPECTED)


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_malformed_claim_gives_one_line_with_file_and_line(name):
    line, words = EXPECTED[name]
    with pytest.raises(UserError) as exc:
        load_claim(MALFORMED / name)
    msg = str(exc.value)
    assert "\n" not in msg
    assert msg.startswith(f"{MALFORMED / name}:{line}:"), msg
    assert words in msg


def test_demo_claims_read():
    good = load_claim(DATA / "BD-1004-typical.csv")
    assert good.part_id == "BD-1004" and good.column == "delta_C_pct"
    # delta C in percent of nominal_C_F: -60 % of 1 uF is 0.4 uF
    assert good.C(25.0) == pytest.approx(0.4e-6)
    assert (good.freq_Hz, good.ac_level_Vrms, good.temp_C, good.age_h) == (1000, 1.0, 25, 1000)
    assert good.tolerance.minus == good.tolerance.plus == 15
    bad = load_claim(DATA / "BD-1004-optimistic.csv")
    assert bad.C(0.0) == pytest.approx(1.0e-6) and bad.column == "C_uF"


def test_claim_interpolates_like_scipy_pchip_and_never_extrapolates():
    claim = load_claim(DATA / "BD-1004-typical.csv")
    ref = PchipInterpolator(claim.bias_V, claim.C_F)  # reference library: scipy
    v = np.linspace(0, 25, 101)
    assert np.allclose(claim.C(v), ref(v), rtol=1e-12)
    # PCHIP keeps a monotone claim monotone (Fritsch-Carlson; scipy docs)
    assert np.all(np.diff(claim.C(v)) <= 0)
    for outside in (-0.1, 25.01):
        with pytest.raises(UserError, match="never extrapolated"):
            claim.C(outside)


def test_header_values_may_carry_their_own_unit_and_prefix():
    text = ("# format = benchkit-claim\n# version = 1\n# part_id = BD-1004\n"
            "# freq_Hz = 1 kHz\n# ac_level_Vrms = 500m\n# nominal_C_F = 1u\n"
            "bias_V,delta_C_pct\n0,0\n5,-4\n10,-17\n")
    c = parse_claim(text, "x.csv")
    assert c.freq_Hz == 1000 and c.ac_level_Vrms == pytest.approx(0.5)
    assert c.C(10) == pytest.approx(0.83e-6) and c.tolerance is None
    with pytest.raises(UserError, match="no tolerance"):
        c.limits(5.0)


@pytest.mark.parametrize("body, words", [
    ("bias_V,delta_C_pct\n0,0\n5,-4\n10,-17\n", "nominal_C_F"),
    ("bias_V,C_F\n0,1e-6\n5,-0.9e-6\n10,0.8e-6\n", "must be positive"),
    ("bias_V,C_F\n0,1e-6\n5,0.9e-6,3\n10,0.8e-6\n", "expected 2"),
    ("bias_V,C_F,D\n0,1e-6,0.1\n", "two columns"),
    ("", "no column row"),
])
def test_more_bad_claims(body, words):
    text = ("# format = benchkit-claim\n# version = 1\n# part_id = BD-1004\n"
            "# freq_Hz = 1000\n# ac_level_Vrms = 1\n" + body)
    with pytest.raises(UserError, match=words):
        parse_claim(text, "x.csv")


def test_missing_and_repeated_header_keys():
    base = "# format = benchkit-claim\n# version = 1\n# part_id = BD-1004\n"
    with pytest.raises(UserError, match="freq_Hz' missing"):
        parse_claim(base + "# ac_level_Vrms = 1\nbias_V,C_F\n0,1\n1,1\n2,1\n", "x.csv")
    with pytest.raises(UserError, match="given twice"):
        parse_claim(base + "# part_id = BD-1005\n", "x.csv")
    with pytest.raises(UserError, match="version"):
        parse_claim(base.replace("version = 1", "version = 2") + "# freq_Hz = 1\n"
                    "# ac_level_Vrms = 1\nbias_V,C_F\n0,1\n1,1\n2,1\n", "x.csv")


def test_byte_order_mark_and_crlf_are_accepted(tmp_path):
    # spreadsheets often save UTF-8 with a BOM and CRLF line ends (common practice)
    src = (DATA / "BD-1004-typical.csv").read_text()
    p = tmp_path / "bom.csv"
    p.write_bytes(b"\xef\xbb\xbf" + src.replace("\n", "\r\n").encode())
    assert load_claim(p).C(25.0) == pytest.approx(0.4e-6)


def test_claim_as_a_fits_table_curve():
    claim = load_claim(DATA / "BD-1004-typical.csv")
    curve = claim.to_curve()
    assert curve.model == "table" and curve.origin == "supplier claim"
    assert curve.part_id == "BD-1004" and curve.conditions["freq_Hz"] == 1000
    v = np.linspace(0, 25, 51)
    # the fits table model is PCHIP too (scipy): both give the same curve
    assert np.allclose(curve.C(v), claim.C(v), rtol=1e-12)
    from fits import Curve

    again = Curve.from_json(curve.to_json())
    assert np.allclose(again.C(v), claim.C(v), rtol=1e-12)
