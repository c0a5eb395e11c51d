"""Operating-point budget: the chain of factors multiplies to the answer, each factor against
its own source; the parallel count is the smallest that meets the need at worst case."""

import json
import math

import numpy as np
import pytest
from hypothesis import given, strategies as st

from benchkit.cli import main
from benchkit.catalogue.codes import parse_tolerance
from benchkit.errors import EXIT_BAD_INPUT, EXIT_OK, UserError
from benchkit.verify import budget

# An invented tanh-type curve for BD-1004 (demo): C(V) = C_inf + (C_pk - C_inf) sech^2(V/V0)
P25 = {"C_inf_F": 0.25e-6, "C_pk_F": 1.02e-6, "V0_V": 14.0, "V_off_V": 0.0}


def tanh_C(V, p):
    """The model written out by hand (Chen and Yu 2004 form), not through fits."""
    return p["C_inf_F"] + (p["C_pk_F"] - p["C_inf_F"]) / np.cosh((V - p["V_off_V"]) / p["V0_V"]) ** 2


def curve(params, temp_C=25.0, sample="S-1", u_rel=0.0):
    from fits import Curve

    cov = np.diag([(u_rel * params["C_inf_F"]) ** 2, (u_rel * params["C_pk_F"]) ** 2, 0.0, 0.0])
    return Curve("tanh", params, cov, (0.0, 25.0), origin="measured", part_id="BD-1004",
                 sample_id=sample, conditions={"temp_C": temp_C, "freq_Hz": 1000.0,
                                               "ac_level_Vrms": 1.0, "function": "CPD"})


@pytest.fixture
def library(tmp_path):
    from benchkit.library import Library
    from benchkit.catalogue import DEMO_PARTS, load_parts

    path = tmp_path / "lib.sqlite"
    with Library(path) as lib:
        lib.add_parts(load_parts(DEMO_PARTS).values())
        lib.add_curve(curve(P25, sample="S-1"))
        lib.add_curve(curve({**P25, "C_pk_F": 0.98e-6, "V0_V": 13.0}, sample="S-2"))
    return path


def open_lib(path):
    from benchkit.library import Library

    return Library(path, create=False)


def test_chain_multiplies_to_the_answer(library):
    with open_lib(library) as lib:
        part, b = budget.from_library(lib, "BD-1004", bias_V=12.0, temp_C=85.0, age_h=10000.0)
    f = {x.name: x for x in b.factors}
    # the chain multiplies to the answer, for each of nominal, typical, worst
    for which in ("nominal", "typical", "worst"):
        prod = math.prod(getattr(x, which) for x in b.factors)
        assert getattr(b, f"{which}_F") == pytest.approx(1e-6 * prod, rel=1e-12)
    assert b.nominal_F == pytest.approx(1e-6)  # BD-1004 is 1 uF (demo catalogue)
    # tolerance K: worst -10 % [standard: IEC 60062]
    assert f["tolerance"].worst == pytest.approx(0.90)
    # DC bias: C(12)/C(0) of the two curves, by hand from the tanh form
    r1 = tanh_C(12.0, P25) / tanh_C(0.0, P25)
    p2 = {**P25, "C_pk_F": 0.98e-6, "V0_V": 13.0}
    r2 = tanh_C(12.0, p2) / tanh_C(0.0, p2)
    assert f["DC bias"].typical == pytest.approx((r1 + r2) / 2, rel=1e-9)
    assert f["DC bias"].worst == pytest.approx(min(r1, r2), rel=1e-9)  # zero covariance
    # temperature: no curve at 85 degC in the library -> X7R bound -15 % [standard: EIA-198]
    assert f["temperature"].worst == pytest.approx(0.85) and f["temperature"].typical == 1.0
    assert "X7R" in f["temperature"].basis
    # aging from 1000 h to 10000 h: one decade, k = 2.5 typical (X7R, common practice):
    # (1 - 0.025*4)/(1 - 0.025*3) = 0.972973; worst over k = 1..4: (1 - 0.16)/(1 - 0.12)
    assert f["aging"].typical == pytest.approx(0.9 / 0.925, rel=1e-12)
    assert f["aging"].worst == pytest.approx(0.84 / 0.88, rel=1e-12)
    assert b.worst_F < b.typical_F < b.nominal_F


def test_fit_uncertainty_lowers_the_worst_bias_factor(tmp_path):
    u = 0.01  # 1 % standard uncertainty on both capacitance parameters
    c = curve(P25, u_rel=u)
    f = budget.bias_factor([c], 12.0, k=2.0)
    # delta method by hand: dC/dC_inf = 1 - sech^2, dC/dC_pk = sech^2
    s2 = 1 / np.cosh(12.0 / 14.0) ** 2
    u_C = math.hypot((1 - s2) * u * P25["C_inf_F"], s2 * u * P25["C_pk_F"])
    assert f.worst == pytest.approx((tanh_C(12.0, P25) - 2 * u_C) / tanh_C(0.0, P25), rel=1e-9)


def test_measured_temperature_behaviour_is_used_when_the_library_has_it(library):
    from benchkit.library import Library

    with Library(library) as lib:
        hot = {**P25, "C_pk_F": 0.95 * P25["C_pk_F"], "C_inf_F": 0.95 * P25["C_inf_F"]}
        lib.add_curve(curve(hot, temp_C=85.0, sample="S-1"))
    with open_lib(library) as lib:
        _, b = budget.from_library(lib, "BD-1004", bias_V=12.0, temp_C=85.0)
    t = {x.name: x for x in b.factors}["temperature"]
    # measured: C_85(12 V) over the mean of the two 25 degC curves at 12 V
    p2 = {**P25, "C_pk_F": 0.98e-6, "V0_V": 13.0}
    expect = tanh_C(12.0, hot) / ((tanh_C(12.0, P25) + tanh_C(12.0, p2)) / 2)
    assert t.typical == pytest.approx(expect, rel=1e-9) and t.basis.startswith("measured")
    # no age given: the 1000 h reference of the tolerance (EIA-198-1 1.1.2), factor 1
    assert {x.name: x for x in b.factors}["aging"].typical == 1.0


def test_parallel_count_is_the_smallest_meeting_the_need(library):
    with open_lib(library) as lib:
        _, b = budget.from_library(lib, "BD-1004", bias_V=20.0, temp_C=85.0, age_h=50000.0,
                                   need_F=2.2e-6)
    n = b.parallel_count
    assert n * b.worst_F >= 2.2e-6 and (n - 1) * b.worst_F < 2.2e-6
    assert n == math.ceil(2.2e-6 / b.worst_F)


@given(need=st.floats(1e-12, 1e-2), per=st.floats(1e-12, 1e-3))
def test_parallel_count_property(need, per):
    n = budget.parallel_count(need, per)
    assert n >= 1 and n * per >= need and (n == 1 or (n - 1) * per < need)


def test_rc_time_constant_and_large_signal_charge(library):
    with open_lib(library) as lib:
        _, b = budget.from_library(lib, "BD-1004", bias_V=12.0, resistor_ohm=1500.0)
    tau = b.tau_s()
    # tau = R*C (small signal) for each column
    assert tau["worst"] == pytest.approx(1500.0 * b.worst_F)
    assert tau["typical"] == pytest.approx(1500.0 * b.typical_F)
    assert b.charge_time_s["typical_to_63pct"] > 0


def test_charge_time_against_check_value():
    # Nonlinear RC charge, C = C0/(1 + V^2), R = 1 ohm, C0 = 1 F, step 1 V: 0.5 V at
    # 0.634183 s, 63.2 % (1 - 1/e) at 0.865894 s; t = R*int C(v)/(Vs - v) dv [derived]
    C = lambda v: 1.0 / (1.0 + v * v)  # noqa: E731
    assert budget.charge_time(C, 1.0, 1.0, 0.5) == pytest.approx(0.634183, abs=1e-6)
    assert budget.charge_time(C, 1.0, 1.0, 1 - math.exp(-1)) == pytest.approx(0.865894, abs=1e-6)
    # a linear capacitor: t = RC ln 2 to half the step (handbook RC charge)
    assert budget.charge_time(lambda v: 1.0, 1.0, 1.0, 0.5) == pytest.approx(math.log(2))


def test_budget_refuses_what_it_cannot_know(library):
    with open_lib(library) as lib:
        with pytest.raises(UserError, match="never extrapolated"):
            budget.from_library(lib, "BD-1004", bias_V=30.0)
        with pytest.raises(UserError, match="outside the range of X7R"):
            budget.from_library(lib, "BD-1004", bias_V=5.0, temp_C=150.0)
        with pytest.raises(UserError, match="no measured curve"):
            budget.from_library(lib, "BD-1001", bias_V=1.0)
    with pytest.raises(UserError):
        budget.parallel_count(1e-6, 0.0)
    with pytest.raises(UserError):
        budget.operating_point(1e-6, parse_tolerance("K"), "K", "X7R", [curve(P25)], 5.0,
                               resistor_ohm=-1.0)


def test_budget_command(library, capsys):
    code = main(["budget", "BD-1004", "--bias", "12", "--temp", "85", "--age-hours", "10000",
                 "--need", "4u7", "--resistor", "1k5", "--library", str(library)])
    captured = capsys.readouterr()
    out, err = captured.out, captured.err
    assert code == EXIT_OK
    assert "in parallel" in out and "tau =" in out
    assert "caution: Verify" in err and "data sheet" in err and "caution" not in out  # notes: stderr
    code = main(["budget", "BD-1004", "--bias", "12", "--need", "4u7", "--library", str(library), "--json"])
    doc = json.loads(capsys.readouterr().out)
    prod = math.prod(f["worst"] for f in doc["factors"])
    assert doc["effective_C_F"]["worst"] == pytest.approx(1e-6 * prod)
    assert doc["need_F"] == pytest.approx(4.7e-6)  # RKM 4u7 [standard: IEC 60062]
    assert doc["parallel_count_worst_case"] * doc["effective_C_F"]["worst"] >= 4.7e-6


@pytest.mark.parametrize("argv", [
    ["budget", "BD-1004", "--bias", "30"],
    ["budget", "BD-9999", "--bias", "1"],
    ["budget", "BD-1004", "--bias", "1", "--temp", "200"],
    ["budget", "BD-1004", "--bias", "1", "--need", "lots"],
    ["budget", "BD-1004", "--bias", "1", "--age-hours", "-5"],
])
def test_budget_bad_input(argv, library, capsys):
    assert main(argv + ["--library", str(library)]) == EXIT_BAD_INPUT
    assert capsys.readouterr().err.count("\n") == 1


def test_budget_without_a_library_file(tmp_path, capsys):
    assert main(["budget", "BD-1004", "--bias", "1", "--library", str(tmp_path / "none.sqlite")]) == EXIT_BAD_INPUT
    assert "no library file" in capsys.readouterr().err
