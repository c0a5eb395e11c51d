"""The C(V, T) SPICE export in ngspice: small-signal C at a DC bias, at several temperatures.

Reference: ngspice's `.ac` linearises a charge-defined capacitor at its DC operating point, so
|I|/(2*pi*f*V_ac) is the small-signal C(V_bias) [common practice]; compared with the curve
family (fits/family.py) it was exported from. Curves are invented for the test.
"""

from __future__ import annotations

import math
import subprocess

import numpy as np
import pytest

from benchkit.exports.spice_temp import spice_family_subcircuit
from fits import Curve
from fits.family import CurveFamily

F_HZ = 1e3


def member(T, f, v0):
    params = {"C_inf_F": 1.2e-6 * f, "C_pk_F": 10e-6 * f, "V0_V": v0, "V_off_V": 0.0}
    return Curve("tanh", params, np.zeros((4, 4)), (0.0, 16.0), part_id="BD-1003",
                 conditions={"temp_C": T, "freq_Hz": 1e3, "ac_level_Vrms": 1.0, "function": "CPD"})


FAMILY = CurveFamily([member(-55.0, 0.89, 2.2), member(25.0, 1.0, 2.5), member(85.0, 1.02, 2.9),
                      member(125.0, 0.92, 3.4)])


def small_signal_C(ex, subckt, instances, folder, temp_C=None):
    """{label: C} from one ngspice .ac run: each instance biased by its own DC source."""
    exe = ex.need_ngspice()
    lines = ["* benchkit export test: small-signal C of the temperature model", subckt]
    for k, (bias, inst_params) in enumerate(instances):
        lines += [f"V{k} n{k} 0 DC {bias!r} AC 1", f"X{k} n{k} 0 BD_1003 {inst_params}"]
    lines += [".control", "option numdgt=15"]
    if temp_C is not None:
        lines.append(f"set temp={temp_C!r}")
    lines += [f"ac lin 1 {F_HZ!r} {F_HZ!r}"]
    lines += [f"print abs(i(v{k}))" for k in range(len(instances))]
    lines += ["quit", ".endc", ".end", ""]
    (folder / "t.cir").write_text("\n".join(lines), encoding="utf-8")
    out = subprocess.run([exe, "-b", "t.cir"], cwd=folder, capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, out.stdout[-2000:] + out.stderr[-2000:]
    vals = {}
    for line in out.stdout.splitlines():
        if line.strip().startswith("abs(i(v"):
            k = int(line.split("(v")[1].split(")")[0])
            vals[k] = float(line.split("=")[1]) / (2 * math.pi * F_HZ)
    assert len(vals) == len(instances), out.stdout[-2000:]
    return [vals[k] for k in range(len(instances))]


@pytest.mark.parametrize("temp_C", [-55.0, 25.0, 125.0, 100.0])
def test_ngspice_C_at_bias_and_temperature_within_1_pct_of_the_family(ex, tmp_path, temp_C):
    sub = spice_family_subcircuit(FAMILY)
    biases = [0.0, 4.0, 12.0]
    got = small_signal_C(ex, sub, [(b, f"T_C={temp_C!r}") for b in biases], tmp_path)
    want = [FAMILY.C(b, temp_C) for b in biases]
    for g, w, b in zip(got, want, biases):
        assert g == pytest.approx(w, rel=0.01), f"{b} V, {temp_C} degC"
        assert abs(g / w - 1) < 1e-6      # in fact the same expression, to ngspice's digits


def test_without_T_C_the_circuit_temperature_is_used(ex, tmp_path):
    sub = spice_family_subcircuit(FAMILY, esr_ohm=0.01)
    got = small_signal_C(ex, sub, [(12.0, "")], tmp_path, temp_C=125.0)[0]
    assert got == pytest.approx(FAMILY.C(12.0, 125.0), rel=0.01)
    # negative control: the 25 degC member alone is more than 1 % off at 125 degC, so the
    # comparison above can fail
    assert abs(FAMILY.curves[1].C(12.0) / FAMILY.C(12.0, 125.0) - 1) > 0.01


def test_the_comment_block_states_temperatures_and_range():
    sub = spice_family_subcircuit(FAMILY, name="BD-1003")
    assert "measured temperatures: -55, 25, 85, 125 degC" in sub
    assert ".subckt BD_1003 a b params: T_C=-1000" in sub
    assert all(line.startswith("*") or line.split()[0] in (".subckt", "C1", ".ends")
               for line in sub.splitlines())
