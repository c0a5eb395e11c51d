"""The regression spline: its space, its fit, its range, and its place in model="auto".

Sources: the not-a-knot end condition (C. de Boor, A Practical Guide to Splines, 1978, from
memory) makes the interpolant exact for cubic polynomials and leaves the first and last
interior knots without a break in the third derivative; scipy.interpolate.CubicSpline is the
reference implementation and numpy.linalg.lstsq the reference least-squares solver.
Invented demo-style values only (Brackwater Dynamics).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.interpolate import CubicSpline

from fits import OutOfRange, fit_sweep, models
from fits import fitting
from fits.sweepdata import check_sweep
from benchkit.benchmarks import independent_truths as T


def _knots(k, lo=0.0, hi=25.0):
    return np.linspace(lo, hi, k)


@pytest.mark.parametrize("k", [4, 5, 7, 9])
def test_power_basis_spans_the_not_a_knot_space(k):
    # every column of the power basis is a not-a-knot spline on these knots: scipy's
    # interpolant through its values at the knots reproduces it everywhere (reference)
    spec = models.get("spline", n_points=k)
    kn = _knots(k)
    V = np.linspace(0.0, 25.0, 301)
    P = spec.power_basis(V, kn)
    Pk = spec.power_basis(kn, kn)
    for j in range(k):
        np.testing.assert_allclose(CubicSpline(kn, Pk[:, j])(V), P[:, j], atol=1e-12)
    assert np.linalg.matrix_rank(P) == k


@pytest.mark.parametrize("k", [4, 5, 8, 12])
def test_C_is_scipys_not_a_knot_spline_through_the_knot_values(k):
    # reference: scipy.interpolate.CubicSpline(bc_type="not-a-knot", extrapolate=False);
    # outside the knots NaN (no extrapolation), a scalar bias gives a scalar
    spec = models.get("spline", n_points=k)
    rng = np.random.default_rng(k)
    kn = np.sort(np.concatenate([[0.0, 6.3], rng.uniform(0.2, 6.1, k - 2)]))
    vals = 1e-6 * (1.0 + 0.1 * rng.standard_normal(k))
    params = spec.params_from_points(kn, vals)
    V = np.concatenate([np.linspace(0.0, 6.3, 257), [-0.01, 6.31, np.nan]])
    ref = CubicSpline(kn, vals, bc_type="not-a-knot", extrapolate=False)(V)
    got = spec.C(V, **params)
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-18)
    assert np.all(np.isnan(got[-3:])) and got.shape == V.shape
    assert np.ndim(spec.C(1.0, **params)) == 0
    one = CubicSpline(kn, vals, bc_type="not-a-knot")(1.0)
    assert float(spec.C(1.0, **params)) == pytest.approx(float(one), rel=1e-9)
    grid = spec.C(V[:5].reshape(5, 1), **params)  # shapes are kept
    assert grid.shape == (5, 1)


@pytest.mark.parametrize("k", [4, 6, 12])
def test_jacobian_in_knot_values_is_scipys_spline_through_the_unit_vectors(k):
    # dC/dC_j is the not-a-knot spline through the j-th unit vector: scipy's CubicSpline
    # through np.eye (reference); a band's or a fit's columns alone equal the full ones
    spec = models.get("spline", n_points=k)
    kn = _knots(k, 0.0, 6.3)
    V = np.linspace(0.0, 6.3, 211)
    params = spec.params_from_points(kn, 1e-6 * (1.0 - 0.05 * np.arange(k)))
    J = spec.jacobian(V, params)
    ref = CubicSpline(kn, np.eye(k), bc_type="not-a-knot")(V)
    np.testing.assert_allclose(J[:, k:], ref, atol=1e-11)
    names = [f"C{j}_F" for j in range(k)][::-1] + ["V1_V"]
    sub = spec.jacobian_of(V, params, names)
    cols = [spec.param_names.index(n) for n in names]
    np.testing.assert_allclose(sub, J[:, cols], rtol=1e-12, atol=1e-18)
    assert np.all(np.isnan(spec.jacobian_of(np.array([-0.1, 6.4]), params, names[:1])))


def test_a_fit_in_the_power_basis_equals_the_fit_in_knot_values():
    # same space, so the same least-squares projection: fitted values and hat diagonal
    # against numpy.linalg.lstsq on scipy's spline basis (reference)
    rng = np.random.default_rng(4)
    V = np.linspace(0.0, 25.0, 21)
    C = 1e-6 * (1.0 + 0.3 * np.cos(V / 5.0)) * (1.0 + 1e-3 * rng.standard_normal(V.size))
    kn = _knots(6)
    spec = models.get("spline", n_points=6)
    B = CubicSpline(kn, np.eye(6))(V)
    ref, *_ = np.linalg.lstsq(B, C, rcond=None)
    P = spec.power_basis(V, kn)
    coef, *_ = np.linalg.lstsq(P, C, rcond=None)
    np.testing.assert_allclose(P @ coef, B @ ref, rtol=1e-10)
    hat_B = np.diag(B @ np.linalg.pinv(B))
    hat_P = np.diag(P @ np.linalg.pinv(P))
    np.testing.assert_allclose(hat_P, hat_B, atol=1e-10)


def test_a_cubic_is_fitted_exactly_and_never_extrapolated():
    # not-a-knot reproduces a cubic polynomial (de Boor, from memory): zero residual
    V = np.linspace(0.0, 10.0, 11)
    C = 1e-6 * (2.0 - 0.1 * V + 0.004 * V**2 - 0.0001 * V**3)
    out = fit_sweep(V, C, model="spline")
    grid = np.linspace(0.0, 10.0, 97)
    np.testing.assert_allclose(out.curve.C(grid), 1e-6 * (2.0 - 0.1 * grid + 0.004 * grid**2
                                                         - 0.0001 * grid**3), rtol=1e-9)
    with pytest.raises(OutOfRange):
        out.curve.C(10.5)
    assert np.isfinite(out.curve.u_C(np.array([0.0, 10.0]))).all()


def test_auto_follows_a_flat_top_no_compact_law_describes():
    # the blurred step of the independent truths (a box blurred by a Gaussian: flatter on
    # top than any law of the bell family) on a denser sweep: the flexible candidate is
    # the one that describes it
    V = np.linspace(0.0, 25.0, 26)
    C_true = T.truth("blurred-step", V, "rising")
    rng = np.random.default_rng(2)
    sigma = 0.002 * C_true
    out = fit_sweep(V, C_true + rng.normal(size=V.size) * sigma, sigma)
    grid = np.linspace(0.0, 25.0, 400)
    err = np.abs(out.curve.C(grid) - T.truth("blurred-step", grid, "rising"))
    assert out.curve.stats["describes_data"]
    assert err.max() / C_true[0] < 0.005
    assert np.mean(err <= 2 * out.curve.u_C(grid)) >= 0.9


def test_only_the_first_interval_may_hold_a_turn_the_data_do_not_show():
    # a hysteretic branch peaks at its coercive bias, which can lie before the first step
    # [common practice]; the same bump between two later points is a wiggle
    V = np.linspace(0.0, 10.0, 11)
    data = check_sweep(V, 1e-6 * (1.0 - 0.05 * V), 1e-9 * np.ones(V.size))
    grid = np.linspace(0.0, 10.0, 400)
    base = 1e-6 * (1.0 - 0.05 * grid)
    peak_at = lambda at: 1e-6 - 5e-8 * np.sqrt((grid - at) ** 2 + 0.01)  # noqa: E731
    bump = lambda at: 2e-8 * np.exp(-((grid - at) / 0.2) ** 2)  # noqa: E731
    tol = fitting._turn_tol(data)
    assert not fitting._wiggles(base, grid, data, 0, tol)
    assert not fitting._wiggles(peak_at(0.5), grid, data, 0, tol)  # rises to 0.5 V, then falls
    assert fitting._wiggles(peak_at(5.5), grid, data, 0, tol)
    assert fitting._wiggles(base + bump(5.5), grid, data, 0, tol)  # a bump mid-sweep: 2 turns
    assert fitting._wiggles(peak_at(0.5) + bump(5.5), grid, data, 0, tol)
