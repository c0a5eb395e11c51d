"""The Curve object and its JSON document (DEVELOPERS.md, "File formats": curve document): round trip, atomic
save, range guard, and one clear error naming the field for each kind of bad document."""

from __future__ import annotations

import json
import math
import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fits import Curve, CurveDocumentError, OutOfRange, fit_sweep, models

CONTRACT_KEYS = {"format", "version", "model", "param_names", "params", "covariance",
                 "valid_range_V", "model_error_F", "model_choice_u_F", "conditions", "stats", "source",
                 "origin", "part_id", "sample_id", "branch"}


@pytest.fixture(scope="module")
def fitted():
    # invented demo data: a BD-1001 sample, tanh-shaped, 0.2 % noise
    spec = models.get("tanh")
    V = np.linspace(0, 6.3, 22)
    C = spec.C(V, 1.1e-6, 10e-6, 1.9, 0.1)
    rng = np.random.default_rng(8)
    sigma = 0.002 * C
    return fit_sweep(V, C + rng.normal(size=V.size) * sigma, sigma, branch="rising",
                     conditions={"freq_Hz": 1000.0, "ac_level_Vrms": 1.0, "temp_C": 25.0,
                                 "function": "CPD"},
                     source={"points_sha256": "ab" * 32, "run_id": "RUN-1"},
                     part_id="BD-1001", sample_id="FX-01").curve


def test_document_has_the_contract_fields(fitted):
    d = fitted.to_dict()
    assert set(d) == CONTRACT_KEYS
    assert d["format"] == "benchkit-curve" and d["version"] == 1
    assert d["source"]["branch"] == "rising" and d["source"]["sample_id"] == "FX-01"
    assert d["source"]["points_sha256"] == "ab" * 32
    assert set(d["conditions"]) >= {"freq_Hz", "ac_level_Vrms", "temp_C", "function"}
    assert set(d["stats"]) >= {"r2", "rms_pct_C0", "max_resid_pct_C0", "n_points", "aic", "bic"}
    json.dumps(d, allow_nan=False)  # strict JSON: no NaN anywhere


def test_round_trip_same_C_to_1e12(fitted, tmp_path):
    V = np.linspace(0, 6.3, 101)
    back = Curve.from_json(fitted.to_json())
    np.testing.assert_allclose(back.C(V), fitted.C(V), rtol=1e-12, atol=0)
    np.testing.assert_allclose(back.u_C(V), fitted.u_C(V), rtol=1e-12, atol=0)
    path = fitted.save(tmp_path / "sub" / "curve.json")
    assert [p.name for p in path.parent.iterdir()] == ["curve.json"]  # no temp file left
    loaded = Curve.load(path)
    np.testing.assert_allclose(loaded.C(V), fitted.C(V), rtol=1e-12, atol=0)
    assert loaded.to_dict() == fitted.to_dict()


@settings(max_examples=40, deadline=None)
@given(C_inf=st.floats(0, 5e-6), amp=st.floats(1e-9, 1e-4), V0=st.floats(0.05, 50),
       V_off=st.floats(-3, 3), lo=st.floats(-20, 0), width=st.floats(0.5, 40))
def test_round_trip_property_tanh(C_inf, amp, V0, V_off, lo, width):
    c = Curve("tanh", dict(C_inf_F=C_inf, C_pk_F=C_inf + amp, V0_V=V0, V_off_V=V_off),
              np.diag([1e-18, 4e-18, 1e-4, 1e-4]), (lo, lo + width))
    back = Curve.from_json(c.to_json())
    V = np.linspace(lo, lo + width, 17)
    np.testing.assert_allclose(back.C(V), c.C(V), rtol=1e-12, atol=0)


@pytest.mark.parametrize("name, params", [
    ("landau", dict(C0_F=4e-6, V_k_V=1.5, C_p_F=0.3e-6)),
    ("poly", dict(V_scale_V=6.0, a0_F=5e-6, a2_F=-2e-6, a4_F=0.4e-6)),
    ("table", dict(V0_V=0.0, V1_V=2.0, V2_V=5.0, C0_F=5e-6, C1_F=3e-6, C2_F=1e-6)),
])
def test_round_trip_other_models(name, params, tmp_path):
    c = Curve(name, params, None, (0.0, 5.0), origin="supplier claim", part_id="BD-1002")
    back = Curve.load(c.save(tmp_path / f"{name}.json"))
    V = np.linspace(0, 5, 23)
    np.testing.assert_allclose(back.C(V), c.C(V), rtol=1e-12, atol=0)
    assert back.origin == "supplier claim" and back.part_id == "BD-1002"


def test_out_of_range_is_refused_unless_extrapolating(fitted):
    with pytest.raises(OutOfRange, match="outside the valid range 0 V to 6.3 V"):
        fitted.C(7.0)
    with pytest.raises(OutOfRange):
        fitted.C(np.array([1.0, -0.5]))
    assert math.isfinite(fitted.C(7.0, extrapolate=True))
    with pytest.raises(OutOfRange, match="integrates from 0 V"):
        Curve("tanh", dict(C_inf_F=1, C_pk_F=2, V0_V=1, V_off_V=0), None, (1.0, 3.0)).Q(2.0)


def test_table_never_extrapolated():
    c = Curve.from_points([0, 1, 3], [10e-6, 8e-6, 5e-6], u_C_F=[1e-8] * 3)
    with pytest.raises(OutOfRange, match="never extrapolated"):
        c.C(3.5, extrapolate=True)
    assert c.u_C(1.0) == pytest.approx(1e-8, rel=1e-9)  # at a point: that point's u
    assert c.origin == "supplier claim"


def test_delta_pct_and_equivalent_capacitances(fitted):
    # delta against 0 V; C_Q and C_E of a falling C(V) lie between C(V) and C(0)
    # (Costinett et al. 2015 definitions)
    assert fitted.delta_pct(0.0) == pytest.approx(0.0, abs=1e-12)
    V = 5.0
    assert fitted.delta_pct(V) == pytest.approx(100 * (fitted.C(V) / fitted.C0_F - 1))
    assert fitted.C(V) < fitted.C_E(V) < fitted.C_Q(V) < fitted.C0_F
    assert fitted.energy_J(V) > 0 and fitted.Q(0.0) == 0.0


def _doc(fitted):
    return json.loads(fitted.to_json())


BAD = [
    ("format", lambda d: d.update(format="other"), "field 'format'"),
    ("version", lambda d: d.update(version=2), "field 'version'"),
    ("version-type", lambda d: d.update(version="1"), "field 'version'"),
    ("missing", lambda d: d.pop("covariance"), "field 'covariance': missing"),
    ("model", lambda d: d.update(model="cubic-spline"), "field 'model'"),
    ("param_names", lambda d: d.update(param_names=["C_inf_F", "C_pk_F"]), "field 'param_names'"),
    ("params-missing", lambda d: d["params"].pop("V0_V"), "field 'params.V0_V'"),
    ("params-nan", lambda d: d["params"].update(V0_V=float("nan")), "field 'params.V0_V'"),
    ("params-text", lambda d: d["params"].update(C_pk_F="10u"), "field 'params.C_pk_F'"),
    ("params-unphysical", lambda d: d["params"].update(V0_V=-1.0), "field 'params'"),
    ("cov-shape", lambda d: d.update(covariance=[[1.0, 0.0], [0.0, 1.0]]), "field 'covariance'"),
    ("cov-asym", lambda d: d["covariance"][0].__setitem__(1, 1e-6), "field 'covariance'"),
    ("range", lambda d: d.update(valid_range_V=[5.0, 1.0]), "field 'valid_range_V'"),
    ("origin", lambda d: d.update(origin="guess"), "field 'origin'"),
    ("branch", lambda d: d.update(branch="up"), "field 'branch'"),
    ("conditions", lambda d: d["conditions"].update(freq_Hz="1 kHz"), "field 'conditions.freq_Hz'"),
    ("source", lambda d: d["source"].update(run_id=7), "field 'source.run_id'"),
]


@pytest.mark.parametrize("case, mutate, expect", BAD, ids=[b[0] for b in BAD])
def test_bad_documents_name_the_field(fitted, case, mutate, expect):
    d = _doc(fitted)
    mutate(d)
    with pytest.raises(CurveDocumentError, match=expect.replace("(", r"\(")) as info:
        Curve.from_json(json.dumps(d), where="curve.json")
    assert "\n" not in str(info.value) and str(info.value).startswith("curve.json: ")


def test_not_json_and_unreadable_file(tmp_path):
    with pytest.raises(CurveDocumentError, match="not valid JSON"):
        Curve.from_json("{nope", where="x.json")
    with pytest.raises(CurveDocumentError, match="cannot read"):
        Curve.load(tmp_path / "missing.json")
    with pytest.raises(CurveDocumentError, match="JSON object"):
        Curve.from_json("[1, 2]")


def test_save_replaces_atomically(fitted, tmp_path):
    target = tmp_path / "c.json"
    target.write_text("old", encoding="utf-8")
    fitted.save(target)
    assert Curve.load(target).to_dict() == fitted.to_dict()
    assert sorted(os.listdir(tmp_path)) == ["c.json"]
