"""Generalised Johnson law: the Landau-type fall with a free exponent, a floor and a peak.

    C(V) = C_fl + (C_pk - C_fl) * (1 + u^2)^(-m),   u = (V - V_pk) / V_k,   V_k = V_w*sqrt(m)

Physics. The Johnson relation eps(E) = eps(0) / (1 + lambda*(eps0*eps(0))^3*E^2)^(1/3)
(K. M. Johnson, J. Appl. Phys. 33, 2826 (1962)) is this law with m = 1/3, no floor and the
peak at 0 V. Real ceramics follow it only roughly: a spread of grain sizes and local fields
turns the single exponent into an effective one, a linear part (margins, grain boundaries)
stays at high field, and a hysteretic branch has its peak moved off 0 V. m, C_fl and V_pk
are those three corrections; each variant frees them only when the data ask for it.
For m = 1 and no floor this is the rational law C0/(1 + (V/Vh)^2) (C(Vh) = C0/2) [derived].

Parameters: C_pk_F (peak), C_fl_F (floor), V_w_V, m, V_pk_V. The knee V_k is written through
the width V_w = V_k/sqrt(m): near the peak C = C_pk - (C_pk - C_fl)*((V - V_pk)/V_w)^2 + ...,
whatever m, so V_w and m are nearly independent in a fit (with V_k and m the fit runs along a
curved valley; measured on a 41-point sweep, 30 instead of 43 evaluations). As m grows the law
tends to the Gaussian C_fl + A*exp(-((V - V_pk)/V_w)^2).

Charge, exact: with F(u) = u * 2F1(m, 1/2; 3/2; -u^2) (scipy.special.hyp2f1),
    Q(V) = C_fl*V + (C_pk - C_fl) * V_k * (F(u) - F(u0)),   u0 = -V_pk/V_k,
so Q(0) = 0 and dQ/dV = C. No elementary antiderivative exists for general m.

SPICE charge. With u = sinh(t) the integral is V_k * integral over t from asinh(u0) to
asinh(u) of cosh(t)^(1 - 2m) dt: a smooth integrand whose nearest singularities sit at
t = +-i*pi/2 whatever the bias, integrated by a fixed Gauss-Legendre rule written out as an
elementary expression (asinh, cosh, pow). Its accuracy against scipy.integrate.quad is
tested in tests/fits/test_genjohnson.py; ngspice's own capacitance in tests/fits/test_spice.py.

Energy: W = integral of v*C(v) dv from 0 to V, closed form:
    C_fl*V^2/2 + A*V_k*V_pk*(F(u) - F(u0)) + A*V_k^2*((1+u^2)^(1-m) - (1+u0^2)^(1-m))/(2(1-m))
(the last term -> A*V_k^2*ln((1+u^2)/(1+u0^2))/2 at m = 1), A = C_pk - C_fl.
"""

from __future__ import annotations

import numpy as np
from scipy.special import hyp2f1

from fits.errors import ModelError
from fits.models.base import ModelSpec, Variant, scan_two_term, spice_number

#: Gauss-Legendre nodes of the SPICE charge (see the module docstring)
SPICE_NODES = 24
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(SPICE_NODES)
#: exponent limits a fit may use: below 0.05 the law is a floor plus a slow log, above 12
#: the fall is steeper than any dielectric reported [common practice]
M_RANGE = (0.05, 12.0)


def _F(u, m):
    return u * hyp2f1(m, 0.5, 1.5, -u * u)


def _pow_term(L, a):
    """expm1(a*L)/a, continuous at a = 0 (-> L)."""
    a = np.asarray(a, dtype=float)
    small = np.abs(a) < 1e-8
    safe = np.where(small, 1.0, a)
    return np.where(small, L * (1.0 + 0.5 * a * L), np.expm1(safe * L) / safe)


class GenJohnsonModel(ModelSpec):
    name = "genjohnson"
    title = "generalised Johnson: C_fl + (C_pk - C_fl)/(1 + ((V - V_pk)/V_k)^2)^m"
    param_names = ("C_pk_F", "C_fl_F", "V_w_V", "m", "V_pk_V")
    analytic_jacobian = True
    compact = True

    def C(self, V, C_pk_F, C_fl_F, V_w_V, m, V_pk_V):
        z = (np.asarray(V, dtype=float) - V_pk_V) / V_w_V
        return C_fl_F + (C_pk_F - C_fl_F) * np.exp(-m * np.log1p(z * z / m))

    def Q(self, V, C_pk_F, C_fl_F, V_w_V, m, V_pk_V):
        V = np.asarray(V, dtype=float)
        V_k_V = V_w_V * np.sqrt(m)
        u = (V - V_pk_V) / V_k_V
        u0 = -V_pk_V / V_k_V
        return C_fl_F * V + (C_pk_F - C_fl_F) * V_k_V * (_F(u, m) - _F(u0, m))

    def W(self, V, C_pk_F, C_fl_F, V_w_V, m, V_pk_V):
        V = np.asarray(V, dtype=float)
        V_k_V = V_w_V * np.sqrt(m)
        A = C_pk_F - C_fl_F
        u = (V - V_pk_V) / V_k_V
        u0 = -V_pk_V / V_k_V
        lin = A * V_k_V * V_pk_V * (_F(u, m) - _F(u0, m))
        quad = A * V_k_V**2 * (_pow_term(np.log1p(u * u), 1.0 - m)
                               - _pow_term(np.log1p(u0 * u0), 1.0 - m)) / 2.0
        return 0.5 * C_fl_F * V**2 + lin + quad

    def jacobian(self, V, params):
        V = np.atleast_1d(np.asarray(V, dtype=float))
        C_pk, C_fl = float(params["C_pk_F"]), float(params["C_fl_F"])
        Vw, m, Vp = float(params["V_w_V"]), float(params["m"]), float(params["V_pk_V"])
        Vk = Vw * np.sqrt(m)
        u = (V - Vp) / Vk
        uu = u * u
        L = np.log1p(uu)
        g = np.exp(-m * L)
        A = C_pk - C_fl
        t = (2.0 * m * A) * g / (1.0 + uu)  # -A*dg/du = t*u
        # dC/dV_k at fixed m is t*u^2/V_k. V_k = V_w*sqrt(m): dC/dV_w = dC/dV_k*sqrt(m);
        # dC/dm|V_w = dC/dm|V_k + dC/dV_k*V_k/(2m), with dC/dm|V_k = -A*g*L
        out = np.empty((V.size, 5))
        out[:, 0] = g
        out[:, 1] = 1.0 - g
        out[:, 2] = t * uu * (np.sqrt(m) / Vk)
        out[:, 3] = t * uu / (2.0 * m) - A * g * L
        out[:, 4] = t * u / Vk
        return out

    def spice_charge(self, params, v):
        self.check_params(params)
        C_pk, C_fl = float(params["C_pk_F"]), float(params["C_fl_F"])
        Vw, m, Vp = float(params["V_w_V"]), float(params["m"]), float(params["V_pk_V"])
        Vk = Vw * np.sqrt(m)
        n = spice_number
        t0 = float(np.arcsinh(-Vp / Vk))
        T1 = f"asinh((({v}) - {n(Vp)})/{n(Vk)})"
        span = f"({T1} - {n(t0)})" if t0 != 0.0 else T1
        terms = " + ".join(
            f"{n(w)}*pow(cosh({n(t0)} + {n((1.0 + x) / 2.0)}*{span}), {n(1.0 - 2.0 * m)})"
            for x, w in zip(_GL_NODES, _GL_WEIGHTS)
        )
        q = f"{n((C_pk - C_fl) * Vk / 2.0)}*{span}*({terms})"
        if C_fl != 0.0:
            q += f" + {n(C_fl)}*({v})"
        return q

    def hints(self):
        return {"C_pk_F": {"min": 0.0}, "C_fl_F": {"min": 0.0}, "V_w_V": {"min": 1e-9},
                "m": {"min": M_RANGE[0], "max": M_RANGE[1]}, "V_pk_V": {}}

    def guess(self, V, C):
        """V_w and m by a grid scan in which C_pk and C_fl are the linear least-squares
        solution; V_pk at the largest reading when that lies inside the sweep, else 0 V."""
        V = np.asarray(V, dtype=float)
        C = np.asarray(C, dtype=float)
        vmax = float(np.max(np.abs(V))) or 1.0
        i_max = int(np.argmax(C))
        interior = V.min() < V[i_max] < V.max()
        Vp = float(V[i_max]) if interior else 0.0
        vw = np.geomspace(vmax / 50.0, vmax * 20.0, 30)
        ms = np.array([0.2, 1.0 / 3.0, 0.5, 0.75, 1.0, 1.5, 2.5, 4.0])
        VW, M = np.meshgrid(vw, ms, indexing="ij")
        VW, M = VW.ravel(), M.ravel()
        z = (V[None, :] - Vp) / VW[:, None]
        g = np.exp(-M[:, None] * np.log1p(z * z / M[:, None]))
        C_fl, C_pk, ssr = scan_two_term(1.0 - g, g, C)
        i = int(np.argmin(ssr))
        if not np.isfinite(ssr[i]):
            return {"C_pk_F": float(C.max()), "C_fl_F": 0.0, "V_w_V": vmax, "m": 1.0 / 3.0,
                    "V_pk_V": Vp}
        return {"C_pk_F": float(C_pk[i]), "C_fl_F": float(C_fl[i]), "V_w_V": float(VW[i]),
                "m": float(M[i]), "V_pk_V": Vp}

    def data_bounds(self, V, C):
        V = np.asarray(V, dtype=float)
        vmax = float(np.max(np.abs(V))) or 1.0
        span = float(np.ptp(V)) or 1.0
        return {"V_w_V": (1e-3 * vmax, 1000.0 * vmax), "C_pk_F": (0.0, 100.0 * float(np.max(C))),
                "V_pk_V": (float(V.min()) - span, float(V.max()) + span)}

    def variants(self, V, C):
        V = np.asarray(V, dtype=float)
        # the freest first: each simpler variant then starts where the previous one ended
        out = [Variant(self, {"V_pk_V": 0.0}, "genjohnson + floor"),
               Variant(self, {"C_fl_F": 0.0, "V_pk_V": 0.0}, "genjohnson")]
        if np.unique(V).size >= 8:
            out.insert(0, Variant(self, {}, "genjohnson + floor + peak"))
        return out

    def check_params(self, params):
        super().check_params(params)
        if np.any(np.asarray(params["C_pk_F"]) <= 0):
            raise ModelError("parameter 'C_pk_F' must be > 0 (peak capacitance)")
        if np.any(np.asarray(params["C_fl_F"]) < 0):
            raise ModelError("parameter 'C_fl_F' must be >= 0 (high-field floor)")
        if np.any(np.asarray(params["V_w_V"]) <= 0):
            raise ModelError("parameter 'V_w_V' must be > 0 (width of the peak)")
        if np.any(np.asarray(params["m"]) <= 0):
            raise ModelError("parameter 'm' must be > 0 (exponent of the fall)")
