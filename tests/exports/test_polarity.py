"""Outside the measured bias polarity: the SPICE export mirrors C(-V) = C(V) and says so; the
curve and the CSV table refuse. Reference for the mirrored charge: scipy.integrate.solve_ivp
of the same RC circuit with C(|V|) (an anhysteretic ceramic's C(V) is even in V [common
practice]; the export states the mirror as an assumption)."""

from __future__ import annotations

import numpy as np
import pytest

from benchkit.errors import UserError
from benchkit.exports import render
from benchkit.exports.table_csv import curve_csv
from fits import OutOfRange


@pytest.mark.parametrize("model", ["poly", "tanh"])
def test_spice_header_says_the_negative_polarity_is_mirrored(model, ex):
    curve = ex.fitted_curve(model)
    text = render(curve, "spice", name="BD_1001")
    assert curve.measured_polarity == "positive"
    assert "MIRRORED (C(-V) = C(V)" in text


def test_curve_and_csv_refuse_the_other_polarity(ex):
    curve = ex.fitted_curve("poly")
    with pytest.raises(OutOfRange, match="polarity"):
        curve.C(-12.0, extrapolate=True)
    with pytest.raises(UserError, match="positive bias only"):
        curve_csv(curve, bias_V=[-12.0, 0.0, 5.0])


@pytest.mark.parametrize("model", ["poly", "genjohnson"])
def test_ngspice_negative_step_charges_the_mirrored_capacitor(model, ex, tmp_path):
    ex.need_ngspice()
    curve = ex.fitted_curve(model)
    name = "BD_1001"
    sub = render(curve, "spice", name=name, esr_ohm=0.02)
    step, R = -8.0, 100.0
    tau = R * float(curve.C(0.0))
    t, v = ex.run_ngspice(ex.transient_netlist(sub, name, step_V=step, R_ohm=R, t_stop_s=5 * tau,
                                               t_max_step_s=tau / 400), tmp_path)
    # with C even in V the circuit is odd: the response to -8 V is minus that to +8 V
    ref = -ex.rc_charge_reference(lambda x: float(curve.C(abs(x))), step_V=-step, R_ohm=R,
                                  esr_ohm=0.02, t_eval=t)
    np.testing.assert_allclose(v, ref, rtol=0, atol=2e-3 * abs(step))
    # the poly of the issue: C(-12 V) must be what C(12 V) is, not a polynomial carried on
    assert np.min(v) < 0.9 * step
