"""SPICE charge expressions: evaluated by ngspice (the reference simulator) and in Python,
compared with Q(V); the Landau-type quadrature against scipy.integrate.quad."""

from __future__ import annotations

import re
import shutil
import subprocess

import numpy as np
import pytest
from scipy.integrate import quad

from fits import models

NGSPICE = shutil.which("ngspice")
needs_ngspice = pytest.mark.skipif(NGSPICE is None, reason="ngspice is not installed")

# invented parameter sets (test values only)
PARAMS = {
    "tanh": dict(C_inf_F=1.0e-6, C_pk_F=5.0e-6, V0_V=2.0, V_off_V=0.4),
    "landau": dict(C0_F=4.0e-6, V_k_V=1.5, C_p_F=0.3e-6),
    "genjohnson": dict(C_pk_F=5.0e-6, C_fl_F=0.4e-6, V_w_V=1.8, m=0.8, V_pk_V=0.35),
    "poly": dict(V_scale_V=6.0, a0_F=5e-6, a1_F=-1e-6, a2_F=-2e-6, a3_F=0.5e-6),
    "table": dict(V0_V=-1.0, V1_V=0.0, V2_V=2.0, V3_V=5.0,
                  C0_F=3e-6, C1_F=5e-6, C2_F=3e-6, C3_F=1e-6),
    "spline": dict(V0_V=-1.0, V1_V=0.0, V2_V=1.5, V3_V=3.5, V4_V=5.0,
                   C0_F=3e-6, C1_F=5e-6, C2_F=4e-6, C3_F=2e-6, C4_F=1e-6),
}


def spec_of(name):
    return models.get(name).for_params(tuple(PARAMS[name]))


def python_eval(expr: str, v: float) -> float:
    """Evaluate an ngspice expression without ternaries: the few functions mapped to numpy."""
    ns = {"tanh": np.tanh, "asinh": np.arcsinh, "cosh": np.cosh, "pow": np.power,
          "exp": np.exp, "sqrt": np.sqrt, "atan": np.arctan, "v_in": v}
    return float(eval(expr.replace("V(a)", "v_in"), {"__builtins__": {}}, ns))


def run_ngspice(deck: str, tmp_path, name: str) -> str:
    path = tmp_path / f"{name}.cir"
    path.write_text(deck, encoding="ascii")
    proc = subprocess.run([NGSPICE, "-b", path.name], cwd=tmp_path, capture_output=True,
                          text=True, timeout=60)
    assert proc.returncode == 0, proc.stdout[-2000:] + proc.stderr[-2000:]
    return proc.stdout


@pytest.mark.parametrize("name", ["tanh", "landau", "genjohnson", "poly"])
def test_python_evaluation_of_expression_equals_Q(name):
    spec, p = spec_of(name), PARAMS[name]
    expr = spec.spice_charge(p, "V(a)")
    for v in (-1.7, 0.0, 0.3, 2.5, 5.9):
        assert python_eval(expr, v) == pytest.approx(float(spec.Q(v, **p)), rel=1e-13, abs=1e-25)


def test_landau_spice_quadrature_accuracy_against_quad():
    # the stated accuracy of the 16-point Gauss-Legendre charge: rel. error < 1e-13 for
    # |V/V_k| <= 100 and < 1e-11 for |V/V_k| <= 1e4; reference scipy.integrate.quad
    spec = models.get("landau")
    p = dict(C0_F=1.0, V_k_V=1.0, C_p_F=0.0)
    expr = spec.spice_charge(p, "V(a)")
    for u, tol in [(0.01, 1e-13), (0.7, 1e-13), (3.0, 1e-13), (-20.0, 1e-13), (100.0, 1e-13),
                   (-1e3, 1e-11), (1e4, 1e-11)]:
        ref = quad(lambda s: (1 + s * s) ** (-1 / 3), 0.0, u, epsabs=0, epsrel=2e-14,
                   limit=500)[0]
        assert python_eval(expr, u) == pytest.approx(ref, rel=tol), u
        # and the exact hypergeometric charge (scipy.special.hyp2f1) used by Q()
        assert python_eval(expr, u) == pytest.approx(float(spec.Q(u, **p)), rel=tol), u


@pytest.mark.parametrize("m, V_pk", [(0.2, 0.0), (1.0 / 3.0, 0.0), (1.0, 0.5), (2.5, -0.7),
                                     (6.0, 0.3)])
def test_genjohnson_spice_quadrature_accuracy_against_quad(m, V_pk):
    # the 24-point Gauss-Legendre charge of the generalised Johnson law against
    # scipy.integrate.quad of C itself (reference), and against the hypergeometric Q()
    spec = models.get("genjohnson")
    p = dict(C_pk_F=1.0, C_fl_F=0.1, V_w_V=1.0, m=m, V_pk_V=V_pk)
    expr = spec.spice_charge(p, "V(a)")
    for v in (0.01, 0.7, 3.0, -4.0, 12.0, -30.0):
        ref = quad(lambda x: float(spec.C(x, **p)), 0.0, v, epsabs=0, epsrel=1e-13,
                   limit=500)[0]
        assert python_eval(expr, v) == pytest.approx(ref, rel=1e-9), (m, v)
        assert float(spec.Q(v, **p)) == pytest.approx(ref, rel=1e-10), (m, v)


@needs_ngspice
@pytest.mark.parametrize("name", sorted(PARAMS))
def test_ngspice_dc_sweep_reproduces_Q(name, tmp_path):
    # ngspice evaluates the expression in a behavioural source over a DC sweep; reltol is
    # tightened so the operating point is solved to the digits compared
    spec, p = spec_of(name), PARAMS[name]
    expr = spec.spice_charge(p, "V(a)")
    deck = f"""charge expression check
V1 a 0 DC 0
B1 q 0 V={{1e6*({expr})}}
R1 q 0 1
.control
option numdgt=15
option reltol=1e-12 vntol=1e-14
dc V1 -2 6 0.25
wrdata q.txt v(q)
quit
.endc
.end
"""
    run_ngspice(deck, tmp_path, name)
    data = np.loadtxt(tmp_path / "q.txt")
    V, Q_spice = data[:, 0], data[:, 1] * 1e-6
    Q_ref = spec.Q(V, **p)
    if name in ("table", "spline"):
        # beyond the table the netlist holds C at the end values (documented in table.py):
        # Q continues linearly from the end points
        last = spec.n_points - 1
        lo, hi = p["V0_V"], p[f"V{last}_V"]
        Q_lo, Q_hi = float(spec.Q(lo, **p)), float(spec.Q(hi, **p))
        Q_ref = np.where(V < lo, Q_lo + p["C0_F"] * (V - lo), Q_ref)
        Q_ref = np.where(V > hi, Q_hi + p[f"C{last}_F"] * (V - hi), Q_ref)
        assert np.any(V < lo) and np.any(V > hi)
    np.testing.assert_allclose(Q_spice, Q_ref, rtol=0, atol=1e-9 * np.max(np.abs(Q_ref)))


@needs_ngspice
@pytest.mark.parametrize("name", ["tanh", "landau", "genjohnson"])
def test_ngspice_capacitor_charge_is_conserved(name, tmp_path):
    # the expression as a charge-defined capacitor (C1 a 0 Q={...}) driven by a voltage ramp:
    # the integral of the source current equals -Q(V_end) (charge conservation); 7 printed
    # digits and trapezoidal integration over 2000 steps limit agreement to ~1e-4
    spec, p = spec_of(name), PARAMS[name]
    V_end = 5.0
    deck = f"""charge conservation check
V1 a 0 PWL(0 0 1m {V_end})
C1 a 0 Q={{{spec.spice_charge(p, "V(a)")}}}
.tran 0.5u 1m 0 0.5u
.meas tran qint INTEG I(V1) FROM=0 TO=1m
.end
"""
    out = run_ngspice(deck, tmp_path, name)
    m = re.search(r"qint\s*=\s*([-+0-9.eE]+)", out)
    assert m, out[-2000:]
    assert -float(m.group(1)) == pytest.approx(float(spec.Q(V_end, **p)), rel=1e-3)
