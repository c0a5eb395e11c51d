"""Landau-type model: the Johnson relation plus an optional bias-independent part.

    C(V) = C0 / (1 + (V/V_k)^2)^(1/3) + C_p

The Johnson relation eps(E) = eps(0)/(1 + lambda*(eps0*eps(0))^3*E^2)^(1/3) comes from the
Landau-Devonshire free energy (K. M. Johnson, J. Appl. Phys. 33, 2826 (1962)); with the layer
thickness unknown, E is replaced by V and all constants are lumped into V_k, so
C(V_k) = 2^(-1/3)*C0. C_p (>= 0) is capacitance that does not depend on bias (margins, a
linear dielectric in parallel); a fit keeps it only when the data call for it (variants()).

Charge. Q(V) = C0*V*2F1(1/3, 1/2; 3/2; -(V/V_k)^2) + C_p*V is exact (scipy.special.hyp2f1).
No elementary antiderivative exists: the integrand (1 + u^2)^(-1/3) is a binomial differential
u^m (1 + u^2)^p with m = 0, p = -1/3, and by Chebyshev's theorem it integrates in elementary
terms only if p, (m+1)/2 or (m+1)/2 + p is an integer (here -1/3, 1/2, 1/6: none is).

SPICE charge. With u = sinh(t), Q_J = C0*V_k * integral over t in [0, asinh(V/V_k)] of
cosh(t)^(1/3) dt. That integrand is smooth and its nearest singularities sit at t = +-i*pi/2
whatever the bias, so a fixed 16-point Gauss-Legendre rule is very accurate. The expression is
a sum of 16 elementary terms (asinh, cosh, pow): smooth, odd in V, exactly 0 at 0 V, so the
simulator's capacitance dQ/dV is smooth too. Accuracy against scipy.integrate.quad (tested in
tests/fits/test_spice.py): relative error below 1e-13 for |V/V_k| <= 100 and below 1e-11 for
|V/V_k| <= 1e4.

Energy. W = int v*C(v) dv is elementary: (3/4)*C0*V_k^2*((1 + u^2)^(2/3) - 1) + C_p*V^2/2.
"""

from __future__ import annotations

import numpy as np
from scipy.special import hyp2f1

from fits.errors import ModelError
from fits.models.base import ModelSpec, Variant, scan_two_term, spice_number

_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(16)


class LandauModel(ModelSpec):
    name = "landau"
    title = "Landau-type (Johnson): C0/(1 + (V/V_k)^2)^(1/3) + C_p"
    param_names = ("C0_F", "V_k_V", "C_p_F")
    analytic_jacobian = True
    compact = True

    def C(self, V, C0_F, V_k_V, C_p_F):
        u = np.asarray(V, dtype=float) / V_k_V
        return C0_F * (1.0 + u * u) ** (-1.0 / 3.0) + C_p_F

    def Q(self, V, C0_F, V_k_V, C_p_F):
        V = np.asarray(V, dtype=float)
        u = V / V_k_V
        return C0_F * V * hyp2f1(1.0 / 3.0, 0.5, 1.5, -u * u) + C_p_F * V

    def W(self, V, C0_F, V_k_V, C_p_F):
        V = np.asarray(V, dtype=float)
        u = V / V_k_V
        # (1+u^2)^(2/3) - 1 written with expm1/log1p so small biases keep their digits
        return 0.75 * C0_F * V_k_V**2 * np.expm1((2.0 / 3.0) * np.log1p(u * u)) + 0.5 * C_p_F * V**2

    def jacobian(self, V, params):
        V = np.atleast_1d(np.asarray(V, dtype=float))
        C0, Vk = float(params["C0_F"]), float(params["V_k_V"])
        u2 = (V / Vk) ** 2
        g = (1.0 + u2) ** (-1.0 / 3.0)
        dVk = (2.0 / 3.0) * C0 * u2 / Vk * (1.0 + u2) ** (-4.0 / 3.0)
        return np.column_stack([g, dVk, np.ones_like(V)])

    def spice_charge(self, params, v):
        self.check_params(params)
        C0, Vk, Cp = float(params["C0_F"]), float(params["V_k_V"]), float(params["C_p_F"])
        n = spice_number
        T = f"asinh(({v})/{n(Vk)})"
        terms = " + ".join(
            f"{n(w)}*pow(cosh({n((1.0 + x) / 2.0)}*{T}), {n(1.0 / 3.0)})"
            for x, w in zip(_GL_NODES, _GL_WEIGHTS)
        )
        q = f"{n(C0 * Vk / 2.0)}*{T}*({terms})"
        if Cp != 0.0:
            q += f" + {n(Cp)}*({v})"
        return q

    def hints(self):
        return {"C0_F": {"min": 0.0}, "V_k_V": {"min": 1e-9}, "C_p_F": {"min": 0.0}}

    def guess(self, V, C):
        """V_k by a scan in which C0 and C_p are the linear least-squares solution."""
        V = np.asarray(V, dtype=float)
        C = np.asarray(C, dtype=float)
        vmax = float(np.max(np.abs(V))) or 1.0
        trials = np.geomspace(vmax / 100.0, vmax * 30.0, 60)
        g = (1.0 + (V[None, :] / trials[:, None]) ** 2) ** (-1.0 / 3.0)
        C_p, C0, ssr = scan_two_term(np.ones_like(g), g, C)
        i = int(np.argmin(ssr))
        if not np.isfinite(ssr[i]):
            return {"C0_F": float(C.max()), "V_k_V": vmax, "C_p_F": 0.0}
        return {"C0_F": float(C0[i]), "V_k_V": float(trials[i]), "C_p_F": float(C_p[i])}

    def data_bounds(self, V, C):
        vmax = float(np.max(np.abs(V))) or 1.0
        return {"V_k_V": (1e-9, 1000.0 * vmax), "C0_F": (0.0, 100.0 * float(np.max(C)))}

    def variants(self, V, C):
        return [
            Variant(self, {"C_p_F": 0.0}, "landau"),
            Variant(self, {}, "landau + C_p"),
        ]

    def check_params(self, params):
        super().check_params(params)
        if np.any(np.asarray(params["C0_F"]) <= 0):
            raise ModelError("parameter 'C0_F' must be > 0 (zero-bias Johnson capacitance)")
        if np.any(np.asarray(params["V_k_V"]) <= 0):
            raise ModelError("parameter 'V_k_V' must be > 0 (knee voltage)")
        if np.any(np.asarray(params["C_p_F"]) < 0):
            raise ModelError("parameter 'C_p_F' must be >= 0 (bias-independent capacitance)")
