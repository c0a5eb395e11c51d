"""Analytic checks of the C(V) models against published relations and scipy's integrator.

Sources: tanh charge model, Chen Ang and Yu Zhi, Phys. Rev. B 69, 174109 (2004); Johnson
relation, K. M. Johnson, J. Appl. Phys. 33, 2826 (1962); charge- and energy-equivalent
capacitance, Costinett, Maksimovic, Zane, IEEE Trans. Power Electron. 30(2), 985 (2015).
Reference library: scipy.integrate.quad, scipy.special.hyp2f1.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import quad

from fits import Curve, models

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
BIASES = [-0.9, -0.3, 0.25, 1.0, 2.7, 4.9]


def spec_of(name):
    return models.get(name).for_params(tuple(PARAMS[name]))


def test_registry_names_and_lookup():
    assert models.names() == ["genjohnson", "landau", "poly", "spline", "table", "tanh"]
    with pytest.raises(KeyError, match="known models"):
        models.get("nonesuch")
    with pytest.raises(ValueError, match="already registered"):
        models.register(type(models.get("tanh"))())
    assert models.get("poly", degree=4, even=True).param_names == (
        "V_scale_V", "a0_F", "a2_F", "a4_F")


def test_landau_at_knee_is_cube_root_half():
    # Johnson 1962 with V in place of E: C(V_k) = C0 * 2^(-1/3) = 0.793701*C0 [derived]
    spec = models.get("landau")
    c = spec.C(2.5, C0_F=1.0, V_k_V=2.5, C_p_F=0.0)
    assert c == pytest.approx(2.0 ** (-1.0 / 3.0), rel=1e-15)
    assert c == pytest.approx(0.793701, abs=5e-7)


@pytest.mark.parametrize("x, ratio", [(1.0, 0.793701), (7.0, 0.5), (26.0, 1.0 / 3.0)])
def test_johnson_ratio_check_values(x, ratio):
    # Johnson ratio against x = (V/V_k)^2: 1 -> 0.793701, 7 -> 0.5, 26 -> 1/3 [derived from
    # Johnson 1962]
    spec = models.get("landau")
    assert spec.C(np.sqrt(x), C0_F=1.0, V_k_V=1.0, C_p_F=0.0) == pytest.approx(ratio, abs=5e-7)


def test_tanh_check_values_via_curve():
    # tanh charge model, C_lin = 1, Q_s/V0 = 4 (so C_pk = 5, V0 = 1, V_off = 0):
    # C(0) = 5; C(V0) = 2.679897; C_Q(V0) = 4.046377; C_E(V0) = 3.622507 [derived from
    # Chen & Yu 2004 with the C_Q, C_E definitions of Costinett et al. 2015]
    curve = Curve("tanh", dict(C_inf_F=1.0, C_pk_F=5.0, V0_V=1.0, V_off_V=0.0), None, (-2.0, 2.0))
    assert curve.C0_F == pytest.approx(5.0, abs=5e-7)
    assert curve.C(1.0) == pytest.approx(2.679897, abs=5e-7)
    assert curve.C_Q(1.0) == pytest.approx(4.046377, abs=5e-7)
    assert curve.C_E(1.0) == pytest.approx(3.622507, abs=5e-7)
    # the nonlinear part halves at arccosh(sqrt 2)*V0 = 0.881374*V0 [derived]
    assert curve.C(0.881374) - 1.0 == pytest.approx(2.0, abs=1e-5)


@pytest.mark.parametrize("p", [
    dict(C_inf_F=1.0e-6, C_pk_F=5.0e-6, V0_V=2.0, V_off_V=0.4),
    dict(C_inf_F=0.2e-6, C_pk_F=22e-6, V0_V=0.7, V_off_V=-1.1),
    dict(C_inf_F=0.0, C_pk_F=1e-9, V0_V=15.0, V_off_V=3.0),
])
def test_tanh_charge_derivative_is_capacitance(p):
    # dQ/dV = C (Chen & Yu 2004: C is the derivative of the tanh charge), checked by a
    # central difference with h = 1e-5*V0: truncation error ~h^2, round-off ~eps*Q/h
    spec = models.get("tanh")
    V = np.linspace(-5.0, 8.0, 27)
    h = 1e-5 * p["V0_V"]
    dQ = (spec.Q(V + h, **p) - spec.Q(V - h, **p)) / (2 * h)
    np.testing.assert_allclose(dQ, spec.C(V, **p), rtol=1e-7)


@pytest.mark.parametrize("name", sorted(PARAMS))
def test_charge_is_integral_of_capacitance(name):
    # Q(V) = int_0^V C dv and W(V) = int_0^V v C(v) dv, reference scipy.integrate.quad
    spec, p = spec_of(name), PARAMS[name]
    assert float(spec.Q(0.0, **p)) == 0.0
    for V in BIASES:
        q_ref = quad(lambda v: float(spec.C(v, **p)), 0.0, V, epsabs=0, epsrel=1e-13)[0]
        w_ref = quad(lambda v: v * float(spec.C(v, **p)), 0.0, V, epsabs=0, epsrel=1e-13)[0]
        assert float(spec.Q(V, **p)) == pytest.approx(q_ref, rel=1e-11)
        assert float(spec.W(V, **p)) == pytest.approx(w_ref, rel=1e-11)


def test_landau_charge_large_bias_against_quad():
    # the hypergeometric charge far beyond the knee (|V/V_k| up to 1e3), reference quad
    spec = models.get("landau")
    p = dict(C0_F=1.0, V_k_V=0.05, C_p_F=0.0)
    for V in (-50.0, 3.0, 50.0):
        ref = quad(lambda v: float(spec.C(v, **p)), 0.0, V, epsabs=0, epsrel=1e-13, limit=200)[0]
        assert float(spec.Q(V, **p)) == pytest.approx(ref, rel=1e-11)


@pytest.mark.parametrize("name", sorted(PARAMS))
def test_analytic_jacobian_matches_central_differences(name):
    # the models' dC/dp against the generic central-difference jacobian (step 1e-6 relative)
    spec, p = spec_of(name), PARAMS[name]
    V = np.array([-0.5, 0.3, 1.7, 4.2])
    J = spec.jacobian(V, p)
    Jn = models.ModelSpec.jacobian(spec, V, p)
    scale = np.max(np.abs(Jn), axis=0) + 1e-300
    np.testing.assert_allclose(J / scale, Jn / scale, atol=1e-7)


@pytest.mark.parametrize("name", sorted(PARAMS))
def test_parameter_arrays_broadcast(name):
    # 50 curves at once (numpy broadcasting) equal 50 single evaluations
    spec, p = spec_of(name), PARAMS[name]
    rng = np.random.default_rng(1)
    factors = rng.uniform(0.9, 1.1, 50)
    arrays = {k: (v * factors if k.endswith("_F") else np.full(50, v)) for k, v in p.items()}
    V = np.array([0.0, 1.0, 3.0])
    many = spec.C(V[:, None], **arrays)
    assert many.shape == (3, 50)
    for j in range(50):
        single = spec.C(V, **{k: float(a[j]) for k, a in arrays.items()})
        np.testing.assert_allclose(many[:, j], single, rtol=1e-14)
    q = spec.Q(2.0, **arrays)
    assert np.shape(q) == (50,)


def test_table_never_extrapolates_and_is_monotone():
    # PCHIP keeps monotone data monotone (Fritsch-Carlson, via scipy PchipInterpolator)
    spec = models.get("table", n_points=4)
    p = dict(V0_V=0.0, V1_V=1.0, V2_V=2.0, V3_V=6.0, C0_F=10.0, C1_F=9.0, C2_F=4.0, C3_F=3.9)
    V = np.linspace(0, 6, 601)
    assert np.all(np.diff(spec.C(V, **p)) <= 0)
    assert np.isnan(spec.C(6.5, **p)) and np.isnan(spec.C(-0.1, **p))


def test_landau_check_params_rejects_unphysical():
    with pytest.raises(ValueError, match="V_k_V"):
        models.get("landau").check_params(dict(C0_F=1.0, V_k_V=-1.0, C_p_F=0.0))


def test_genjohnson_with_exponent_one_third_is_the_johnson_relation():
    # K. M. Johnson, J. Appl. Phys. 33, 2826 (1962): C0/(1 + (V/V_k)^2)^(1/3); with m = 1/3,
    # no floor and the peak at 0 V the generalised law is the Landau-type model exactly
    # (V_w = V_k/sqrt(m) by its definition) [derived]
    gj, la = models.get("genjohnson"), models.get("landau")
    V = np.linspace(-7, 9, 33)
    p = dict(C_pk_F=4e-6, C_fl_F=0.0, V_w_V=1.5 / np.sqrt(1 / 3), m=1 / 3, V_pk_V=0.0)
    q = dict(C0_F=4e-6, V_k_V=1.5, C_p_F=0.0)
    np.testing.assert_allclose(gj.C(V, **p), la.C(V, **q), rtol=1e-13)
    np.testing.assert_allclose(gj.Q(V, **p), la.Q(V, **q), rtol=1e-12)
    np.testing.assert_allclose(gj.W(V, **p), la.W(V, **q), rtol=1e-12)
    # Johnson check value: C(V_k) = 2^(-1/3) C0 = 0.793701 C0 [derived, science notes]
    assert float(gj.C(1.5, **p)) / 4e-6 == pytest.approx(0.793701, abs=5e-7)


def test_genjohnson_rational_case_halves_at_the_knee():
    # rational form C0/(1 + (V/Vh)^2): C(Vh) = C0/2 and Q = C0*Vh*arctan(V/Vh) [derived]
    gj = models.get("genjohnson")
    p = dict(C_pk_F=1.0, C_fl_F=0.0, V_w_V=2.0, m=1.0, V_pk_V=0.0)
    assert float(gj.C(2.0, **p)) == pytest.approx(0.5, rel=1e-14)
    for v in (0.3, 2.0, -5.0, 40.0):
        assert float(gj.Q(v, **p)) == pytest.approx(2.0 * np.arctan(v / 2.0), rel=1e-12)


@pytest.mark.parametrize("m", [0.25, 1.0, 1.7, 4.0])
def test_genjohnson_energy_is_integral_of_v_times_C(m):
    # W = int v*C(v) dv (Costinett et al. 2015), the closed form against scipy.integrate.quad
    gj = models.get("genjohnson")
    p = dict(C_pk_F=3e-6, C_fl_F=0.5e-6, V_w_V=1.3, m=m, V_pk_V=-0.4)
    for v in (0.5, 3.0, -6.0, 25.0):
        ref = quad(lambda x: x * float(gj.C(x, **p)), 0.0, v, epsabs=0, epsrel=1e-12,
                   limit=200)[0]
        assert float(gj.W(v, **p)) == pytest.approx(ref, rel=1e-9), (m, v)
