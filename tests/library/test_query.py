"""The design query: answers equal direct evaluation of the stored curves, ranking, coverage, temperature.

Reference for every number: the curve objects themselves (fits.Curve.C / u_C, evaluated one
by one), numpy for means and interpolation. Curves and parts are invented.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from benchkit.errors import UserError


def _by_part(results):
    return {r.part_id: r for r in results}


def test_answers_equal_direct_evaluation(lib, mk):
    # one curve per part, three different models: the query's C and u must be the curve's own
    # C(V) and u_C(V) (u by central differences vs the model's analytic jacobian: 1e-6 relative)
    c1 = mk.make_curve("tanh", mk.tanh_params(), valid=(0.0, 6.3), part_id="BD-1001")
    c2 = mk.make_curve("landau", {"C0_F": 4.7e-6, "V_k_V": 6.0, "C_p_F": 0.2e-6}, valid=(0.0, 16.0), part_id="BD-1002")
    c3 = mk.make_curve("poly", {"V_scale_V": 25.0, "a0_F": 2.2e-6, "a1_F": -0.4e-6, "a2_F": -0.6e-6},
                    valid=(0.0, 25.0), part_id="BD-1003",
                    covariance=np.diag([0.0, 1e-16, 1e-16, 1e-16]))
    for c in (c1, c2, c3):
        lib.add_curve(c)
    for V in (0.0, 1.7, 5.0, 6.3):
        got = _by_part(lib.query(V))
        for c in (c1, c2, c3):
            r = got[c.part_id]
            assert r.covered
            assert r.C_F == pytest.approx(float(c.C(V)), rel=1e-12, abs=0)
            assert r.u_C_F == pytest.approx(float(c.u_C(V)), rel=1e-6)
            assert r.n_curves == 1 and r.origin == "measured"
            # the result hands back curve objects that evaluate themselves
            [rec] = r.curves()
            assert float(rec.curve.C(V)) == pytest.approx(r.C_F, rel=1e-15)


def test_ranking_and_not_covered(lib, mk):
    # BD-1001's curve stops at 6.3 V: at 12 V it is NOT COVERED (never extrapolated), the other
    # two are ranked by C at 12 V, largest first
    c1 = mk.make_curve("tanh", mk.tanh_params(), valid=(0.0, 6.3), part_id="BD-1001")
    c2 = mk.make_curve("landau", {"C0_F": 4.7e-6, "V_k_V": 6.0, "C_p_F": 0.2e-6}, valid=(0.0, 16.0), part_id="BD-1002")
    c3 = mk.make_curve("landau", {"C0_F": 2.2e-6, "V_k_V": 30.0, "C_p_F": 0.0}, valid=(0.0, 25.0), part_id="BD-1003")
    for c in (c1, c2, c3):
        lib.add_curve(c)
    results = lib.query(12.0)
    expected = sorted([("BD-1002", float(c2.C(12.0))), ("BD-1003", float(c3.C(12.0)))], key=lambda x: -x[1])
    assert [(r.part_id, r.C_F) for r in results if r.covered] == [(p, pytest.approx(c, rel=1e-12)) for p, c in expected]
    last = results[-1]
    assert last.part_id == "BD-1001" and not last.covered and last.C_F is None
    assert "6.3 V" in last.reason and "extrapolat" in last.reason
    # the direct call refuses too (fits.OutOfRange): the library agrees with the curve
    from fits import OutOfRange

    with pytest.raises(OutOfRange):
        c1.C(12.0)


def test_part_without_curves_is_listed_not_covered(lib, mk):
    lib.add_curve(mk.make_curve(part_id="BD-1001"))
    got = _by_part(lib.query(1.0))
    assert got["BD-1002"].covered is False and got["BD-1002"].reason == "no curve in the library"


def test_filters_case_class_min(lib, mk):
    c2 = mk.make_curve("landau", {"C0_F": 4.7e-6, "V_k_V": 6.0, "C_p_F": 0.2e-6}, valid=(0.0, 16.0), part_id="BD-1002")
    c3 = mk.make_curve("landau", {"C0_F": 2.2e-6, "V_k_V": 30.0, "C_p_F": 0.0}, valid=(0.0, 25.0), part_id="BD-1003")
    lib.add_curve(c2)
    lib.add_curve(c3)
    assert [r.part_id for r in lib.query(5.0, case="0805")] == ["BD-1003"]
    assert {r.part_id for r in lib.query(5.0, class_code="X7R")} == {"BD-1002", "BD-1003"}
    assert [r.part_id for r in lib.query(5.0, class_code="X5R")] == ["BD-1001"]  # listed, not covered
    threshold = (float(c2.C(5.0)) + float(c3.C(5.0))) / 2
    covered = [r.part_id for r in lib.query(5.0, min_C_F=threshold) if r.covered]
    assert covered == (["BD-1002"] if float(c2.C(5.0)) > float(c3.C(5.0)) else ["BD-1003"])


def test_pooling_of_samples(lib, mk):
    # two samples at one temperature: C = mean, u = sqrt(mean(u_i^2) + s^2) (s: sample std, ddof 1)
    a = mk.make_curve(params=mk.tanh_params(c_pk=10e-6), sample_id="FX-01")
    b = mk.make_curve(params=mk.tanh_params(c_pk=9.4e-6), sample_id="FX-02")
    lib.add_curve(a)
    lib.add_curve(b)
    V = 2.0
    r = _by_part(lib.query(V))["BD-1001"]
    cs = np.array([a.C(V), b.C(V)])
    us = np.array([a.u_C(V), b.u_C(V)])
    assert r.n_curves == 2
    assert r.C_F == pytest.approx(cs.mean(), rel=1e-12)
    assert r.u_C_F == pytest.approx(math.sqrt(np.mean(us**2) + np.var(cs, ddof=1)), rel=1e-6)


def test_temperature_match_interpolation_and_outside(lib, mk):
    # curves at 25 and 85 degC: 26 degC is "at 25" (within +-2), 55 degC is interpolated
    # linearly between them (numpy.interp as reference), 125 degC is not covered
    c25 = mk.make_curve(params=mk.tanh_params(c_pk=10e-6), temp_C=25.0, sample_id="FX-01")
    c85 = mk.make_curve(params=mk.tanh_params(c_pk=8e-6, v0=2.0), temp_C=85.0, sample_id="FX-01")
    lib.add_curve(c25)
    lib.add_curve(c85)
    V = 3.0
    r26 = _by_part(lib.query(V, 26.0))["BD-1001"]
    assert r26.C_F == pytest.approx(float(c25.C(V)), rel=1e-12) and r26.temps_C == (25.0,)
    r55 = _by_part(lib.query(V, 55.0))["BD-1001"]
    expected = np.interp(55.0, [25.0, 85.0], [float(c25.C(V)), float(c85.C(V))])
    assert r55.covered and r55.C_F == pytest.approx(expected, rel=1e-12)
    assert r55.temps_C == (25.0, 85.0) and set(r55.curve_ids) == {1, 2}
    w = 0.5
    assert r55.u_C_F == pytest.approx(math.hypot((1 - w) * c25.u_C(V), w * c85.u_C(V)), rel=1e-6)
    r125 = _by_part(lib.query(V, 125.0))["BD-1001"]
    assert not r125.covered and "outside" in r125.reason and "25..85" in r125.reason
    r_cold = _by_part(lib.query(V, -40.0))["BD-1001"]
    assert not r_cold.covered


def test_interpolation_needs_both_sides_to_reach_the_bias(lib, mk):
    lib.add_curve(mk.make_curve(temp_C=25.0, valid=(0.0, 6.3)))
    lib.add_curve(mk.make_curve(params=mk.tanh_params(c_pk=8e-6), temp_C=85.0, valid=(0.0, 4.0)))
    r = _by_part(lib.query(5.0, 55.0))["BD-1001"]
    assert not r.covered and "4 V" in r.reason


def test_origin_preference_not_mixed(lib, mk):
    # a lot summary answers before measured curves, measured before a supplier claim
    from fits import Curve

    claim = Curve.from_points([0.0, 2.0, 4.0, 6.3], [10e-6, 6e-6, 3.5e-6, 2.5e-6], origin="supplier claim",
                              part_id="BD-1001")
    meas = mk.make_curve(part_id="BD-1001")
    lib.add_curve(claim)
    r = _by_part(lib.query(3.0))["BD-1001"]
    assert r.origin == "supplier claim" and r.C_F == pytest.approx(float(claim.C(3.0)), rel=1e-12)
    lib.add_curve(meas)
    r = _by_part(lib.query(3.0))["BD-1001"]
    assert r.origin == "measured" and r.C_F == pytest.approx(float(meas.C(3.0)), rel=1e-12)
    r = _by_part(lib.query(3.0, origin="supplier claim"))["BD-1001"]
    assert r.origin == "supplier claim"


def test_branch_filter(lib, mk):
    up = mk.make_curve(params=mk.tanh_params(v_off=0.3), branch="rising")
    down = mk.make_curve(params=mk.tanh_params(v_off=-0.3), branch="falling")
    lib.add_curve(up)
    lib.add_curve(down)
    assert _by_part(lib.query(1.0, branch="falling"))["BD-1001"].C_F == pytest.approx(float(down.C(1.0)), rel=1e-12)
    assert _by_part(lib.query(1.0))["BD-1001"].n_curves == 2


def test_vectorised_equals_loop_over_many_curves(tmp_path, mk):
    # 600 random curves of three models over 60 parts, one per part and temperature: the
    # vectorised query equals a plain loop of Curve.C / Curve.u_C calls
    from benchkit.library import Library

    rng = np.random.default_rng(7)
    with Library(tmp_path / "many.sqlite") as lib:
        parts = [{"id": f"BD-2{i:03d}", "description": "synthetic", "nominal_C_F": 1e-6, "tolerance": "K",
                  "rated_V": 16.0, "class_code": "X7R", "case": "0603", "supplier": "invented"} for i in range(60)]
        lib.add_parts(parts)
        curves = []
        for j in range(600):
            pid = parts[j % 60]["id"]
            temp = [-55.0, 25.0, 85.0, 125.0, 150.0, 0.0, 50.0, 100.0, 10.0, 40.0][j // 60]
            kind = j % 3
            hi = float(rng.uniform(3.0, 20.0))
            if kind == 0:
                c = mk.make_curve("tanh", mk.tanh_params(c_pk=float(rng.uniform(1, 5)) * 1e-6, v0=float(rng.uniform(1, 6))),
                               valid=(0.0, hi), temp_C=temp, part_id=pid, sample_id=f"S{j}")
            elif kind == 1:
                c = mk.make_curve("landau", {"C0_F": float(rng.uniform(1, 5)) * 1e-6, "V_k_V": float(rng.uniform(2, 20)),
                                          "C_p_F": 1e-8}, valid=(0.0, hi), temp_C=temp, part_id=pid, sample_id=f"S{j}")
            else:
                c = mk.make_curve("poly", {"V_scale_V": hi, "a0_F": 3e-6, "a1_F": float(rng.uniform(-1, 0)) * 1e-6,
                                        "a2_F": -0.5e-6}, valid=(0.0, hi), temp_C=temp, part_id=pid,
                               sample_id=f"S{j}", covariance=np.diag([0.0, 1e-15, 1e-15, 1e-15]))
            curves.append(c)
        lib.add_curves([(c, None) for c in curves])
        for V, T in ((2.5, 25.0), (8.0, 85.0), (15.0, -55.0)):
            got = _by_part(lib.query(V, T, temp_tol_C=0.5))
            for c in curves:
                if c.conditions["temp_C"] != T:
                    continue
                r = got[c.part_id]
                lo, hi = c.valid_range_V
                if lo <= V <= hi:
                    assert r.covered and r.C_F == pytest.approx(float(c.C(V)), rel=1e-12)
                    assert r.u_C_F == pytest.approx(float(c.u_C(V)), rel=1e-6, abs=1e-30)
                else:
                    assert not r.covered


def test_cache_follows_other_writers(tmp_path, parts, mk):
    # a second Library object (as another process would) adds a curve: the first one's cached
    # arrays are rebuilt because the file's generation counter moved
    from benchkit.library import Library

    path = tmp_path / "shared.sqlite"
    with Library(path) as a, Library(path) as b:
        a.add_parts(parts)
        assert not _by_part(a.query(1.0))["BD-1001"].covered
        b.add_curve(mk.make_curve())
        assert _by_part(a.query(1.0))["BD-1001"].covered


def test_bad_query_arguments(lib, mk):
    with pytest.raises(UserError):
        lib.query(float("nan"))
    with pytest.raises(UserError, match="origin"):
        lib.query(1.0, origin="rumour")
    with pytest.raises(UserError, match="branch"):
        lib.query(1.0, branch="sideways")


def test_band_includes_the_model_error_term(lib):
    # A landau law fitted to a sech^2 peak (invented numbers; scatter 1 nF) does not describe
    # the data: the fit adds a model-error term s_m to the band (fits/quality.py). The query's
    # vectorised band must be the curve's own, u_C^2 = J Sigma J^T + s_m^2 (fits.Curve.u_C, the
    # reference; GUM 5.1.2 for the first term), with the correlated covariance the fit gives.
    from fits import fit_sweep

    V = np.linspace(0.0, 6.0, 25)
    C = 1.5e-6 + 8.5e-6 / np.cosh((V - 0.8) / 2.0) ** 2
    curve = fit_sweep(V, C, np.full_like(V, 1e-9), model="landau").curve
    curve.part_id = "BD-1001"
    assert curve.model_error_F > 0 and curve.stats["describes_data"] is False
    assert curve.covariance[0, 1] != 0.0  # off-diagonal terms: the stored triangle counts them twice
    lib.add_curve(curve)
    for bias in (0.0, 1.0, 3.0, 6.0):
        [r] = [q for q in lib.query(bias) if q.part_id == "BD-1001"]
        fit_only = math.sqrt(float(np.einsum("i,ij,j->", J := curve.spec.jacobian([bias], curve.params)[0],
                                             curve.covariance, J)))
        assert r.u_C_F == pytest.approx(float(curve.u_C(bias)), rel=1e-6)
        assert r.u_C_F > 1.05 * fit_only  # the term is there, not just the fit's own part


def _set_schema_version(lib, conn, version: int) -> None:
    """Mark an open library as an older schema version (how the migrations find it)."""
    if lib.kind == "postgresql":
        conn.execute(f"UPDATE meta SET value = '{int(version)}' WHERE key = 'schema_version'")
    else:
        conn.execute(f"PRAGMA user_version = {int(version)}")


def test_migration_to_v3_brings_the_model_error_into_the_query(library_target):
    # A schema-2 library (query numbers without model_error_F, the old pack layout) is migrated
    # on open, on either backend: afterwards the query's band is the curve's own again
    # (fits.Curve.u_C, the reference).
    from fits import fit_sweep
    from benchkit.library import Library, schema

    V = np.linspace(0.0, 6.0, 25)
    curve = fit_sweep(V, 1.5e-6 + 8.5e-6 / np.cosh((V - 0.8) / 2.0) ** 2, np.full_like(V, 1e-9),
                      model="landau").curve
    with Library(library_target) as lib:
        lib.add_part({"id": "BD-1001", "nominal_C_F": 10e-6, "rated_V": 6.3})
        lib.add_curve(curve, "BD-1001")
        blob = "BYTEA" if lib.kind == "postgresql" else "BLOB"
        with lib._db.write() as conn:  # what a version-2 library held
            conn.execute("DROP TABLE curve_pack")
            conn.execute(f"CREATE TABLE curve_pack (id INTEGER PRIMARY KEY, model TEXT NOT NULL, "
                         f"param_names TEXT NOT NULL, loose INTEGER NOT NULL, n INTEGER NOT NULL, ids {blob} NOT NULL, "
                         f"part_ids TEXT NOT NULL, numbers {blob} NOT NULL, params {blob}, covariance {blob})")
            conn.execute("UPDATE curve SET numbers_f64 = substr(numbers_f64, 1, 40)")
            _set_schema_version(lib, conn, 2)
    with Library(library_target) as lib:
        version = (lib._db.conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()[0]
                   if lib.kind == "postgresql" else lib._db.conn.execute("PRAGMA user_version").fetchone()[0])
        assert int(version) == schema.latest_version() == 4
        [r] = lib.query(3.0)
        assert r.u_C_F == pytest.approx(float(curve.u_C(3.0)), rel=1e-6)


def _sparse_auto_curve():
    # 11 readings of a stretched-exponential peak (invented numbers, 0.3 % scatter, seeded):
    # auto leaves rival laws within two standard errors, so the band carries a model-choice
    # term that varies with bias (fits.Curve.model_choice_u_F)
    from fits import fit_sweep

    V = np.linspace(0.0, 25.0, 11)
    C = 0.5e-6 + 4.2e-6 * np.exp(-np.abs((V - 0.8) / 9.0) ** 1.6)
    rng = np.random.default_rng(3)
    curve = fit_sweep(V, C * (1 + 0.003 * rng.standard_normal(V.size)), 0.003 * C).curve
    assert curve.model_choice_u_F is not None and max(curve.model_choice_u_F) > 0
    return curve


def test_band_includes_the_model_choice_term_at_each_bias(lib):
    # The query's vectorised band must be the curve's own at every bias, the model-choice
    # profile included (fits.Curve.u_C is the reference: u_C^2 = J Sigma J^T + s_m^2 + u_choice^2,
    # GUM 5.1.2 for the first term, JCGM 100 4.3.7 for the last), between its nodes as at them.
    from benchkit.library import pack

    curve = _sparse_auto_curve()
    # the fits write as many values as the schema stores: the library keeps them as they are
    assert len(curve.model_choice_u_F) == pack.CHOICE_NODES
    curve.part_id = "BD-1001"
    lib.add_curve(curve)
    lo, hi = curve.valid_range_V
    for bias in np.linspace(lo, hi, 13):
        [r] = [q for q in lib.query(float(bias)) if q.part_id == "BD-1001"]
        assert r.u_C_F == pytest.approx(float(curve.u_C(bias)), rel=1e-6)
    # and the term is there: somewhere the band is wider than the fit's own part
    grid = np.linspace(lo, hi, 50)
    assert np.max(curve.model_choice_at(grid)) > 0.1 * np.max(curve.u_C(grid))


def test_migration_to_v4_brings_the_model_choice_term_into_the_query(library_target):
    # A schema-3 library (six query numbers a curve, no model-choice term) is migrated on open,
    # on either backend: the term is read back from each curve's document, so the query's band
    # is the curve's own again (fits.Curve.u_C, the reference).
    from benchkit.library import Library, schema

    curve = _sparse_auto_curve()
    with Library(library_target) as lib:
        lib.add_part({"id": "BD-1001", "nominal_C_F": 10e-6, "rated_V": 6.3})
        lib.add_curve(curve, "BD-1001")
        with lib._db.write() as conn:  # what a version-3 library held
            conn.execute("UPDATE curve SET numbers_f64 = substr(numbers_f64, 1, 48)")
            _set_schema_version(lib, conn, 3)
    with Library(library_target) as lib:
        for bias in (0.5, 2.0, 12.0):
            [r] = lib.query(bias)
            assert r.u_C_F == pytest.approx(float(curve.u_C(bias)), rel=1e-6)
