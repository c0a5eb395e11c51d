"""`make demo` end to end: sweep -> points.csv -> fit -> library -> export -> lot verification.

The demo runs the same CLI commands an engineer types, on the simulated bench and a virtual
clock. These checks hold the chain together; the physics and statistics behind each step are
checked against their sources in the per-layer test directories.
"""

from __future__ import annotations

import csv
import json

import pytest

from benchkit.demo import run_demo
from benchkit.library import Library

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return run_demo(tmp_path_factory.mktemp("demo") / "out")


def test_every_sweep_completes_and_leaves_the_supply_off(demo):
    for key in ("fixture_run", "lot_run"):
        meta = json.loads((demo[key] / "run.json").read_text())
        assert meta["status"] == "complete", meta.get("reason")
        # common practice: the bias supply ends at 0 V with its output off
        assert meta["sim_final_supply_state"] == {"set_V": 0.0, "output_on": False, "terminal_V": 0.0}
        with open(demo[key] / "points.csv", newline="") as fh:
            rows = list(csv.DictReader(fh))
        assert len(rows) == meta["n_points_planned"]


def test_a_curve_and_a_plot_for_every_sample(demo):
    curves = sorted(p.name for p in demo["curves"].glob("*.json"))
    samples = {name.split("-rising")[0] for name in curves if "-rising" in name}
    assert samples == {f"FX-0{i}" for i in range(1, 9)}
    assert len(list(demo["plots"].glob("*.png"))) == 8


def test_library_answers_the_design_question(demo):
    results = {r.part.part_id: r for r in Library(demo["library"]).query(bias_V=5.0)}
    # common practice: the same value and rating in a larger case keeps more capacitance
    # (BD-1001 is 10 uF 6.3 V X5R 0402, BD-1002 the same in 0805)
    assert results["BD-1002"].covered and results["BD-1001"].covered
    assert results["BD-1002"].C_F > results["BD-1001"].C_F
    # common practice: a C0G part shows essentially no DC-bias loss
    assert results["BD-1008"].retained_pct == pytest.approx(100.0, abs=0.5)


def test_spice_export_is_a_charge_defined_capacitor(demo):
    libs = sorted(demo["exports"].glob("*.lib"))
    assert libs, "no SPICE file exported"
    text = libs[0].read_text()
    # ngspice manual: a nonlinear capacitor given by its charge is written C... Q={expression}
    assert ".subckt" in text.lower() and "Q={" in text.replace(" ", "")


def test_lot_verification_verdicts(demo):
    typical = json.loads((demo["verify_pass"] / "report.json").read_text())
    optimistic = json.loads((demo["verify_fail"] / "report.json").read_text())
    assert typical["verdict"] == "conforming"
    assert optimistic["verdict"] == "nonconforming"
    assert (demo["verify_pass"] / "report.html").stat().st_size > 10_000  # plots inline
