"""Fits against reference libraries: scipy.optimize.curve_fit, numpy.polynomial, lmfit.

Same data, same weights, same model function: the parameters must agree to 1e-6 relative
(the brief's bar). The matched digits are printed (pytest -s) so they can be reported; in our
runs they were 8 or more for the nonlinear models and 12 or more for the polynomial.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats
from scipy.optimize import curve_fit
from scipy.special import erf

from fits import Curve, fit_sweep, models

# invented "true" curves and 0.3 % noise, seeded
CASES = {
    "tanh": (dict(C_inf_F=1.3e-6, C_pk_F=9.8e-6, V0_V=1.7, V_off_V=0.35), np.linspace(-2, 6.3, 30)),
    "landau": (dict(C0_F=8.0e-6, V_k_V=1.2, C_p_F=0.6e-6), np.linspace(0, 10, 26)),
}


def noisy(spec, p, V, seed=7, rel=0.003):
    rng = np.random.default_rng(seed)
    C = spec.C(V, **p)
    sigma = rel * C
    return C + rng.normal(size=V.size) * sigma, sigma


def matched_digits(a, b):
    rel = np.max(np.abs(np.asarray(a) - np.asarray(b)) / np.abs(np.asarray(b)))
    return np.inf if rel == 0 else -np.log10(rel)


@pytest.mark.parametrize("name", sorted(CASES))
def test_nonlinear_models_agree_with_curve_fit(name):
    # reference: scipy.optimize.curve_fit (MINPACK lm, its own numerical jacobian),
    # absolute_sigma=True with the same sigma, started from the same guess
    spec = models.get(name)
    truth, V = CASES[name]
    C, sigma = noisy(spec, truth, V)
    out = fit_sweep(V, C, sigma, model=name)
    vf = out.fit
    f, free = spec.as_positional({n: vf.params[n] for n in spec.param_names if n not in vf.free_names})
    p0 = [spec.guess(V, C)[n] for n in free]
    popt, pcov = curve_fit(f, V, C, p0=p0, sigma=sigma, absolute_sigma=True,
                           xtol=1e-14, ftol=1e-14, maxfev=20000)
    mine = np.array([out.curve.params[n] for n in free])
    digits = matched_digits(mine, popt)
    print(f"{name} ({vf.label}): parameters match curve_fit to {digits:.1f} digits")
    np.testing.assert_allclose(mine, popt, rtol=1e-6)
    # covariance: curve_fit's pcov (unscaled, absolute sigma) times our stated scale factor;
    # its numerical jacobian limits agreement to ~1e-5
    idx = [spec.param_names.index(n) for n in free]
    np.testing.assert_allclose(out.curve.covariance[np.ix_(idx, idx)],
                               pcov * vf.covar_scale, rtol=1e-3)


def test_tanh_covariance_matches_curve_fit_with_analytic_jacobian():
    # with the same analytic jacobian curve_fit's covariance agrees much more tightly
    spec = models.get("tanh")
    truth, V = CASES["tanh"]
    C, sigma = noisy(spec, truth, V, seed=11)
    out = fit_sweep(V, C, sigma, model="tanh")
    f, free = spec.as_positional()

    def jac(V_, *p):
        return spec.jacobian(V_, dict(zip(free, p)))

    popt, pcov = curve_fit(f, V, C, p0=[spec.guess(V, C)[n] for n in free], sigma=sigma,
                           absolute_sigma=True, jac=jac, xtol=1e-14, ftol=1e-14)
    np.testing.assert_allclose([out.curve.params[n] for n in free], popt, rtol=1e-9)
    np.testing.assert_allclose(out.curve.covariance, pcov * out.fit.covar_scale, rtol=1e-6)


def test_unweighted_fit_matches_curve_fit_scaled_covariance():
    # without sigma both scale the covariance by the residual variance (curve_fit's default
    # absolute_sigma=False)
    spec = models.get("landau")
    truth, V = CASES["landau"]
    C, _ = noisy(spec, truth, V, seed=3)
    out = fit_sweep(V, C, None, model="landau")
    fixed = {n: out.curve.params[n] for n in spec.param_names if n not in out.fit.free_names}
    f, free = spec.as_positional(fixed)
    popt, pcov = curve_fit(f, V, C, p0=[spec.guess(V, C)[n] for n in free], xtol=1e-14,
                           ftol=1e-14)
    idx = [spec.param_names.index(n) for n in free]
    np.testing.assert_allclose([out.curve.params[n] for n in free], popt, rtol=1e-6)
    np.testing.assert_allclose(out.curve.covariance[np.ix_(idx, idx)], pcov, rtol=1e-3)


@pytest.mark.parametrize("degree, even", [(3, False), (5, False), (4, True)])
def test_polynomial_agrees_with_numpy_polyfit(degree, even):
    # reference: numpy.polynomial.polynomial.polyfit with w = 1/sigma in x = V/V_scale
    # (a list of degrees selects the even powers)
    V = np.linspace(-6.0, 6.0, 25)
    x = V / 6.0
    true = [10e-6, 0.0, -6e-6, 0.0, 1.5e-6] if even else [10e-6, -1e-6, -6e-6, 0.8e-6, 1.5e-6, -0.3e-6]
    C = np.polynomial.polynomial.polyval(x, true[: degree + 1])
    rng = np.random.default_rng(5)
    sigma = 0.002 * C
    C = C + rng.normal(size=V.size) * sigma
    spec = models.get("poly", degree=degree, even=even)
    out = fit_sweep(V, C, sigma, model=spec)
    powers = list(range(0, degree + 1, 2 if even else 1))
    ref = np.polynomial.polynomial.polyfit(x, C, powers, w=1.0 / sigma)
    mine = np.zeros(degree + 1)
    for k in powers:
        mine[k] = out.curve.params[f"a{k}_F"]
    digits = matched_digits(mine[powers], ref[powers])
    print(f"poly degree {degree}{' even' if even else ''}: matches numpy.polyfit to {digits:.1f} digits")
    np.testing.assert_allclose(mine[powers], ref[powers], rtol=1e-6)


def test_u_C_matches_lmfit_eval_uncertainty():
    # reference: lmfit ModelResult.eval_uncertainty (its own numerical derivatives) with
    # lmfit's own covariance of the same fit; our delta method with the analytic jacobian
    spec = models.get("tanh")
    truth, V = CASES["tanh"]
    C, sigma = noisy(spec, truth, V, seed=2)
    model = spec.lmfit_model()
    res = model.fit(C / 1e-6, model.guess(C / 1e-6, V=V), V=V, weights=1e-6 / sigma,
                    scale_covar=False)
    assert res.errorbars
    params = {n: res.params[n].value * (1e-6 if n.endswith("_F") else 1.0) for n in spec.param_names}
    scale = np.array([1e-6 if n.endswith("_F") else 1.0 for n in spec.param_names])
    cov = res.covar * np.outer(scale, scale)
    curve = Curve("tanh", params, cov, (V.min(), V.max()))
    Vq = np.linspace(-1.5, 6.0, 9)
    ref = res.eval_uncertainty(V=Vq, sigma=1) * 1e-6
    # lmfit widens its 1-sigma band by the Student-t quantile for (n - k) degrees of
    # freedom at the normal 68.27 % level (lmfit/model.py eval_uncertainty); undo that
    t_factor = stats.t.ppf((erf(1 / np.sqrt(2)) + 1) / 2, V.size - len(spec.param_names))
    np.testing.assert_allclose(curve.u_C(Vq), ref / t_factor, rtol=2e-3)


def test_u_C_matches_monte_carlo():
    # reference: Monte Carlo propagation with numpy (parameters drawn from N(p, cov)); the
    # delta method is exact to first order, so agreement within MC noise (~1 % at 40000 draws)
    spec = models.get("landau")
    truth, V = CASES["landau"]
    C, sigma = noisy(spec, truth, V, seed=4)
    curve = fit_sweep(V, C, sigma, model="landau").curve
    rng = np.random.default_rng(0)
    draws = rng.multivariate_normal([curve.params[n] for n in curve.param_names],
                                    curve.covariance, size=40000)
    Vq = np.array([0.0, 1.0, 3.0, 9.0])
    sims = spec.C(Vq[:, None], **{n: draws[:, j] for j, n in enumerate(curve.param_names)})
    np.testing.assert_allclose(curve.u_C(Vq), sims.std(axis=1), rtol=0.03)
