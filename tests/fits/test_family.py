"""C(V, T) curve families: interpolation in T, its range, uncertainty and document.

References: numpy.interp (linear interpolation), scipy.integrate.quad (Q is the integral of C),
the remainder of linear interpolation f - p = f''/2*(T - a)*(T - b) [published: any
numerical-analysis text], GUM (JCGM 100:2008) propagation checked against a Monte Carlo draw
(JCGM 101:2008, the GUM's supplement 1). Parameter values are invented for the tests.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from fits import Curve, OutOfRange
from fits.errors import CurveDocumentError
from fits.family import CurveFamily, fit_family, group_temperatures


def tanh_curve(T, c_pk, rel_u=0.0, v0=2.5, valid=(0.0, 10.0)):
    params = {"C_inf_F": 1.5e-6, "C_pk_F": c_pk, "V0_V": v0, "V_off_V": 0.0}
    cov = np.diag([(rel_u * abs(v)) ** 2 for v in params.values()])
    return Curve("tanh", params, cov, valid, conditions={"temp_C": T}, part_id="BD-1001",
                 sample_id="S1", branch="rising")


def quad_family(rel_u=0.0):
    # C_pk varies quadratically in T: f'' known exactly (invented numbers)
    temps = [-55.0, 25.0, 85.0, 125.0]
    cpk = lambda T: 10e-6 * (1 - 2e-5 * (T - 25.0) ** 2)
    return CurveFamily([tanh_curve(T, cpk(T), rel_u) for T in temps]), cpk


def test_linear_in_T_matches_numpy_interp_at_every_bias():
    fam, _ = quad_family()
    temps = fam.temps_C
    for V in (0.0, 3.3, 9.0):
        nodes = [c.C(V) for c in fam.curves]
        for T in (-55.0, -10.0, 25.0, 40.0, 85.0, 101.5, 125.0):
            assert fam.C(V, T) == pytest.approx(np.interp(T, temps, nodes), rel=1e-12)


def test_charge_is_the_integral_of_C_at_any_temperature():
    fam, _ = quad_family()
    for T in (-30.0, 60.0, 110.0):
        q, _ = quad(lambda v: fam.C(v, T), 0.0, 7.0, epsabs=0, epsrel=1e-11)
        assert fam.Q(7.0, T) == pytest.approx(q, rel=1e-9)


def test_no_extrapolation_in_temperature_or_bias():
    fam, _ = quad_family()
    with pytest.raises(OutOfRange, match=r"outside the temperatures measured \(-55 to 125 degC\)"):
        fam.C(1.0, 150.0)
    with pytest.raises(OutOfRange):
        fam.C(1.0, -56.0)
    with pytest.raises(OutOfRange, match="valid range"):
        fam.C(12.0, 25.0)
    short = CurveFamily([tanh_curve(25.0, 10e-6), tanh_curve(85.0, 9e-6, valid=(0.0, 6.0))])
    assert short.valid_range_V(50.0) == (0.0, 6.0)
    assert short.valid_range_V(25.0) == (0.0, 10.0)


def test_interpolation_bound_equals_the_true_error_of_a_quadratic_at_mid_interval():
    # remainder of linear interpolation: for a quadratic f, |f - p| at the midpoint is
    # exactly h^2/8*|f''| (the bound is attained): here at 0 V
    fam, cpk = quad_family()
    T = 55.0                                   # midpoint of 25 .. 85
    true = 1.5e-6 + (cpk(T) - 1.5e-6)          # C(0) = C_inf + (C_pk - C_inf)
    err = abs(true - fam.C(0.0, T))
    assert err > 0
    assert fam.u_C(0.0, T) * math.sqrt(3.0) == pytest.approx(err, rel=1e-9)
    assert fam.u_C(0.0, 25.0) == 0.0           # at a measured temperature: no interpolation term


def test_ratio_uncertainty_agrees_with_a_monte_carlo_draw():
    fam, _ = quad_family(rel_u=0.01)
    rng = np.random.default_rng(1)
    r, u = fam.ratio(85.0, 25.0)
    draws = []
    c85, c25 = fam.curves[2], fam.curves[1]
    for _ in range(4000):
        p85 = rng.multivariate_normal([c85.params[n] for n in c85.param_names], c85.covariance)
        p25 = rng.multivariate_normal([c25.params[n] for n in c25.param_names], c25.covariance)
        draws.append(c85.spec.C(0.0, *p85) / c25.spec.C(0.0, *p25))
    assert r == pytest.approx(c85.C(0.0) / c25.C(0.0), rel=1e-12)
    assert u == pytest.approx(np.std(draws), rel=0.06)
    assert fam.ratio(25.0, 25.0) == (1.0, 0.0)     # the reference against itself


def test_document_round_trip_and_clear_errors(tmp_path):
    fam, _ = quad_family(rel_u=0.01)
    path = fam.save(tmp_path / "family.json")
    back = CurveFamily.load(path)
    assert list(back.temps_C) == list(fam.temps_C)
    assert back.C(4.0, 100.0) == fam.C(4.0, 100.0) and back.u_C(4.0, 100.0) == fam.u_C(4.0, 100.0)
    d = fam.to_dict()
    d["temp_range_C"] = [-40.0, 125.0]
    with pytest.raises(CurveDocumentError, match="temp_range_C"):
        CurveFamily.from_dict(d)
    d = fam.to_dict()
    del d["curves"][1]["conditions"]["temp_C"]
    with pytest.raises(CurveDocumentError, match=r"curves\[1\].conditions.temp_C"):
        CurveFamily.from_dict(d)
    with pytest.raises(CurveDocumentError, match="two members at 25 degC"):
        CurveFamily([tanh_curve(25.0, 1e-5), tanh_curve(25.0, 1.1e-5)])


def test_fit_family_groups_by_temperature_and_fits_each():
    rng = np.random.default_rng(3)
    V = np.linspace(0, 10, 21)
    truth = {-55.0: 8e-6, 25.0: 10e-6, 125.0: 7e-6}
    bias, C, T = [], [], []
    for temp, cpk in truth.items():
        c = tanh_curve(temp, cpk).C(V)
        bias += list(V)
        C += list(c * (1 + 1e-4 * rng.standard_normal(V.size)))
        T += list(temp + 0.05 * rng.standard_normal(V.size))   # thermometer scatter
    fam = fit_family(bias, C, T, model="tanh", part_id="BD-1001")
    assert len(fam.curves) == 3
    for temp, cpk in truth.items():
        assert fam.C(0.0, fam.temps_C[list(truth).index(temp)]) == pytest.approx(cpk, rel=2e-3)
    assert list(group_temperatures([25.1, 85.0, 24.9, 84.8])) == [0, 1, 0, 1]
