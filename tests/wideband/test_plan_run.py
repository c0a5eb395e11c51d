"""The wideband plan of data/plans/ run on the simulated bench (virtual clock), fitted, and
checked against the simulator's own truth.

Must show: at least 20 frequencies from 100 Hz to 10 MHz at each of at least 5 biases; the
fitted wideband model within 2 % of the true |Z| over that range at every bias; the
self-resonant frequency within 2 % (the truth: where the true Im Z crosses 0, the handbook's
definition of self-resonance [published: impedance-measurement handbook relations]).
The truth is the part's own impedance (the fixture taken away) at the level it saw in the fixture
at the plan's oscillator level, settled.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

from benchkit.commands.sim import demo_bench
from benchkit.sweep import run_sweep, runlog
from benchkit.sweep.frequency import is_frequency_row
from benchkit.sweep.impedance import read_impedance, wideband_model
from benchkit.sweep.plan import load_plan
from instruments.clock import VirtualClock
from instruments.sim import wideband as sw

PLAN = Path(__file__).resolve().parents[2] / "data" / "plans" / "wideband.toml"


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    out = tmp_path_factory.mktemp("wideband") / "run"
    plan = load_plan(PLAN)
    with demo_bench(clock=VirtualClock()) as bench:
        result = run_sweep(bench, plan, out, handle_signals=False)
        part = bench.fixture.part(6)
        residuals = bench.fixture.wiring.residuals
        state = bench.supply_state()
    return result, out, plan, part, residuals, state


def test_plan_covers_the_range_and_ends_safe(run):
    result, out, plan, _, _, state = run
    assert result.status == "complete"
    assert state["output_on"] is False and abs(state["terminal_V"]) < 1e-9  # 0 V, output off
    rows, _ = runlog.read_points(out)
    freq_rows = [r for r in rows if is_frequency_row(r)]
    biases = sorted({float(r["bias_set_V"]) for r in freq_rows})
    freqs = sorted({float(r["freq_Hz"]) for r in freq_rows})
    assert len(biases) >= 5 and len(freqs) >= 20
    assert freqs[0] == 100.0 and freqs[-1] == 10e6
    assert len(freq_rows) == len(biases) * len(freqs)  # one row per (bias, frequency)
    assert {r["function"] for r in freq_rows} == {"CSRS", "ZTD"}  # Cs-Rs, then |Z|-theta
    meta = json.loads((out / "run.json").read_text())
    fl = meta["frequency_list"]
    assert fl["freq_Hz"] == freqs and fl["correction"]["open_channel"] == 15
    assert (out / "residuals.csv").exists()


def test_wideband_model_within_2_percent_of_truth_and_srf(run):
    _, out, _, part, residuals, _ = run
    rows, _ = runlog.read_points(out)
    model = wideband_model(rows, "FX-06")
    data = read_impedance(out)["FX-06"]
    f = np.unique(data.freq_Hz)
    osc = 0.5
    for V in model.biases_V:
        fit = model.at(V)
        truth = np.array([sw.true_impedance_ohm(part, V, x, osc_level_Vrms=osc, residuals=residuals)
                          for x in f])
        err = np.abs(fit.Z_abs(f) / np.abs(truth) - 1)
        srf = 10 ** brentq(lambda lf: sw.true_impedance_ohm(
            part, V, 10 ** lf, osc_level_Vrms=osc, residuals=residuals).imag, 4, 9, xtol=1e-12)
        print(f"{V:5.1f} V: worst |Z| error {100 * err.max():.3f} %, SRF {fit.srf_Hz():.5g} Hz, "
              f"true {srf:.5g} Hz ({100 * (fit.srf_Hz() / srf - 1):+.3f} %)")
        assert err.max() < 0.02
        assert fit.srf_Hz() == pytest.approx(srf, rel=0.02)


def test_library_answers_esr_impedance_and_srf_at_a_bias(run, tmp_path):
    """ESR at 100 kHz and 12 V, impedance at 1 MHz, SRF at 12 V, and the |Z|/ESR plot, from the
    library; checked against the handbook series model with the stored parameters
    (ESR = floor + D/(w*C*(1 + D^2)), derived from D = w*Cs*Rs) and the simulator's truth."""
    from benchkit.cli import main

    _, out, _, part, residuals, _ = run
    lib = str(tmp_path / "lib.sqlite")
    assert main(["library", "--library", lib, "add-parts", "data/parts.toml"]) == 0
    assert main(["library", "--library", lib, "add", str(out)]) == 0
    from benchkit.library.impedance import answer, wideband_record
    from benchkit.library.store import Library

    with Library(lib) as L:
        rec = wideband_record(L.curves("BD-1006"))
    a = answer(rec.curve, 12.0, 100e3)
    p = rec.curve.wideband.at(12.0).params
    w = 2 * np.pi * 100e3
    C = p["C_F"] * (100e3 / 1e3) ** (-(2 / np.pi) * np.arctan(p["D"]))
    assert a["esr_ohm"] == pytest.approx(p["esr_ohm"] + p["D"] / (w * C * (1 + p["D"] ** 2)), rel=1e-9)
    true_esr = sw.true_impedance_ohm(part, 12.0, 100e3, osc_level_Vrms=0.5, residuals=residuals).real
    assert a["esr_ohm"] == pytest.approx(true_esr, rel=0.05)
    b = answer(rec.curve, 12.0, 1e6)
    true_Z = abs(sw.true_impedance_ohm(part, 12.0, 1e6, osc_level_Vrms=0.5, residuals=residuals))
    assert b["Z_abs_ohm"] == pytest.approx(true_Z, rel=0.02)
    # SRF: the phase crosses 0 there (handbook): capacitive just below, inductive just above
    fit = rec.curve.wideband.at(12.0)
    assert fit.Z(a["srf_Hz"] * (1 - 1e-6)).imag < 0 < fit.Z(a["srf_Hz"] * (1 + 1e-6)).imag
    png = tmp_path / "z.png"
    assert main(["library", "--library", lib, "impedance", "BD-1006", "--bias", "12", "--freq", "100k",
                 "--plot", str(png), "--plot-biases", "0,8,16"]) == 0
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
