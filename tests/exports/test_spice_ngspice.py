"""The SPICE export simulated by ngspice, against scipy.integrate.solve_ivp of the same circuit.

Circuit: a voltage step through a resistor into the exported subcircuit (charge-defined
nonlinear capacitor + ESR). Reference: solve_ivp of dVc/dt = (Vs - Vc)/((R + ESR) C(Vc)) with
C(V) from the curve object. Agreement asked: 0.5 % of the step over the whole waveform.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad, solve_ivp

from benchkit.exports.spice import spice_subcircuit, subckt_name


@pytest.mark.parametrize("model", ["tanh", "landau", "poly"])
def test_ngspice_rc_charge_matches_solve_ivp(model, ex, tmp_path):
    ex.need_ngspice()
    curve = ex.fitted_curve(model)
    esr = 5.0
    R = 95.0
    step = 0.9 * curve.valid_range_V[1]  # the charge stays inside the valid range
    name = subckt_name("BD-1001")
    sub = spice_subcircuit(curve, name="BD-1001", esr_ohm=esr)
    tau = (R + esr) * float(curve.C(0.0))
    t_stop = 6.0 * tau
    # accuracy by a small maximum time step, not by tighter reltol/abstol (ngspice style notes)
    t, v = ex.run_ngspice(ex.transient_netlist(sub, name, step_V=step, R_ohm=R, t_stop_s=t_stop,
                                               t_max_step_s=t_stop / 5000), tmp_path)
    late = t > 10e-9  # after the 1 ns rise of the source
    ref = ex.rc_charge_reference(lambda x: float(curve.C(x)), step_V=step, R_ohm=R, esr_ohm=esr, t_eval=t[late])
    err = np.max(np.abs(v[late] - ref)) / step
    print(f"{model}: worst difference {100 * err:.4f} % of the step")
    assert err < 0.005, f"{model}: worst difference {100 * err:.3f} % of the step"
    assert v[-1] == pytest.approx(step, rel=0.01)  # and it did charge (6 time constants or more)


def test_table_claim_exports_and_simulates(ex, tmp_path):
    # a supplier claim (PCHIP table) through the same check
    from fits import Curve

    ex.need_ngspice()
    claim = Curve.from_points([0.0, 2.0, 4.0, 6.0, 8.0, 10.0], [10e-6, 7.5e-6, 5e-6, 3.6e-6, 2.8e-6, 2.3e-6],
                              origin="supplier claim", part_id="BD-1002")
    sub = spice_subcircuit(claim, esr_ohm=2.0)
    t, v = ex.run_ngspice(ex.transient_netlist(sub, "BD_1002", step_V=9.0, R_ohm=98.0, t_stop_s=4e-3,
                                               t_max_step_s=1e-6), tmp_path)
    late = t > 10e-9
    ref = ex.rc_charge_reference(lambda x: float(claim.C(x)), step_V=9.0, R_ohm=98.0, esr_ohm=2.0, t_eval=t[late])
    assert np.max(np.abs(v[late] - ref)) / 9.0 < 0.005


def test_science_check_value_nonlinear_rc_charge():
    # [derived] check value (science notes, item 7): C = C0/(1 + V^2), R = 1 ohm, C0 = 1 F,
    # step 1 V: 0.5 V at 0.634183 s (linear RC: ln 2 = 0.693147 s); 63.2 % at 0.865894 s;
    # t = R * integral of C(v)/(Vs - v) dv
    def rhs(t, y):
        return [(1.0 - y[0]) * (1.0 + y[0] ** 2)]

    def crossing(level):
        ev = lambda t, y: y[0] - level  # noqa: E731
        ev.terminal = True
        sol = solve_ivp(rhs, (0.0, 5.0), [0.0], rtol=1e-12, atol=1e-14, events=ev)
        return float(sol.t_events[0][0])

    assert crossing(0.5) == pytest.approx(0.634183, abs=1e-6)
    assert crossing(1.0 - math.exp(-1.0)) == pytest.approx(0.865894, abs=1e-6)  # "63.2 %" = 1 - 1/e
    t_quad, _ = quad(lambda v: 1.0 / ((1.0 + v * v) * (1.0 - v)), 0.0, 0.5)
    assert t_quad == pytest.approx(0.634183, abs=1e-6)
    assert math.log(2.0) == pytest.approx(0.693147, abs=1e-6)


def test_science_check_value_in_ngspice(ex, tmp_path):
    # the same [derived] check value through ngspice's charge-defined capacitor: for n = 2 the
    # rational form has Q = C0*Vh*arctan(V/Vh) [derived], here Q = atan(V) with C0 = Vh = 1
    ex.need_ngspice()
    sub = ".subckt RAT a b\nC1 a b Q={atan(V(a,b))}\n.ends RAT\n"
    t, v = ex.run_ngspice(ex.transient_netlist(sub, "RAT", step_V=1.0, R_ohm=1.0, t_stop_s=2.0,
                                               t_max_step_s=2e-4), tmp_path)
    t_half = float(np.interp(0.5, v, t))
    assert t_half == pytest.approx(0.634183, rel=0.005)
    ref = ex.rc_charge_reference(lambda x: 1.0 / (1.0 + x * x), step_V=1.0, R_ohm=1.0, esr_ohm=0.0,
                                 t_eval=t[t > 1e-8])
    assert np.max(np.abs(v[t > 1e-8] - ref)) < 0.005


def test_the_comparison_catches_the_classic_mistake(ex, tmp_path):
    # negative control: Q = C(V)*V (not integrated) is wrong for a voltage-dependent C
    # [common practice]; the same comparison must reject it, or the check above proves nothing
    ex.need_ngspice()
    curve = ex.fitted_curve("tanh")
    p = curve.params
    v = "V(a,b)"
    c_expr = (f"({p['C_inf_F']!r} + ({p['C_pk_F'] - p['C_inf_F']!r})/(cosh(({v} - ({p['V_off_V']!r}))/"
              f"{p['V0_V']!r})**2))")
    sub = f".subckt WRONG a b\nC1 a b Q={{{c_expr}*{v}}}\n.ends WRONG\n"
    step = 9.0
    tau = 100.0 * float(curve.C(0.0))
    t, out = ex.run_ngspice(ex.transient_netlist(sub, "WRONG", step_V=step, R_ohm=100.0, t_stop_s=6 * tau,
                                                 t_max_step_s=6 * tau / 5000), tmp_path)
    late = t > 10e-9
    ref = ex.rc_charge_reference(lambda x: float(curve.C(x)), step_V=step, R_ohm=100.0, esr_ohm=0.0, t_eval=t[late])
    assert np.max(np.abs(out[late] - ref)) / step > 0.02
