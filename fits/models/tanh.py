"""tanh-type model: a linear charge plus a saturating domain/cluster charge.

    Q(V) = C_inf*V + (C_pk - C_inf)*V0*[tanh((V - V_off)/V0) + tanh(V_off/V0)]
    C(V) = dQ/dV = C_inf + (C_pk - C_inf)*sech^2((V - V_off)/V0)

The saturating term P0*tanh(x*E), whose derivative is the sech^2 peak, follows
Chen Ang and Yu Zhi, Phys. Rev. B 69, 174109 (2004). C_pk is the peak capacitance, reached at
V = V_off; C_inf the high-field limit. V_off lets the rising and falling branches of a
hysteretic sweep share one shape with the peak moved to either side of 0 V (for V_off = 0
this is the anhysteretic model with C_lin = C_inf and Q_s = (C_pk - C_inf)*V0). The constant
tanh(V_off/V0) makes Q(0) = 0. Q is closed form, so the SPICE export conserves charge.
"""

from __future__ import annotations

import numpy as np

from fits.errors import ModelError
from fits.models.base import ModelSpec, log_cosh, scan_two_term, sech2, spice_number


class TanhModel(ModelSpec):
    name = "tanh"
    title = "tanh-type: C_inf + (C_pk - C_inf)*sech^2((V - V_off)/V0)"
    param_names = ("C_inf_F", "C_pk_F", "V0_V", "V_off_V")
    analytic_jacobian = True
    compact = True

    def C(self, V, C_inf_F, C_pk_F, V0_V, V_off_V):
        V = np.asarray(V, dtype=float)
        return C_inf_F + (C_pk_F - C_inf_F) * sech2((V - V_off_V) / V0_V)

    def Q(self, V, C_inf_F, C_pk_F, V0_V, V_off_V):
        V = np.asarray(V, dtype=float)
        A = C_pk_F - C_inf_F
        return C_inf_F * V + A * V0_V * (np.tanh((V - V_off_V) / V0_V) + np.tanh(V_off_V / V0_V))

    def W(self, V, C_inf_F, C_pk_F, V0_V, V_off_V):
        # integral of v*C(v): by parts, int v*sech^2(z) dv = V0*v*tanh(z) - V0^2*ln cosh(z)
        V = np.asarray(V, dtype=float)
        A = C_pk_F - C_inf_F
        z = (V - V_off_V) / V0_V
        z0 = -V_off_V / V0_V
        return 0.5 * C_inf_F * V**2 + A * V0_V * (
            V * np.tanh(z) - V0_V * (log_cosh(z) - log_cosh(z0))
        )

    def jacobian(self, V, params):
        V = np.atleast_1d(np.asarray(V, dtype=float))
        C_inf, C_pk = float(params["C_inf_F"]), float(params["C_pk_F"])
        V0, V_off = float(params["V0_V"]), float(params["V_off_V"])
        z = (V - V_off) / V0
        s = sech2(z)
        t = np.tanh(z)
        A = C_pk - C_inf
        # d sech^2(z)/dz = -2 sech^2(z) tanh(z); dz/dV0 = -z/V0; dz/dV_off = -1/V0
        return np.column_stack([1.0 - s, s, 2.0 * A * s * t * z / V0, 2.0 * A * s * t / V0])

    def spice_charge(self, params, v):
        self.check_params(params)
        C_inf, C_pk = float(params["C_inf_F"]), float(params["C_pk_F"])
        V0, V_off = float(params["V0_V"]), float(params["V_off_V"])
        n = spice_number
        offset = np.tanh(V_off / V0)
        return (
            f"{n(C_inf)}*({v}) + {n((C_pk - C_inf) * V0)}"
            f"*(tanh((({v}) - {n(V_off)})/{n(V0)}) + {n(offset)})"
        )

    def hints(self):
        return {
            "C_inf_F": {"min": 0.0},
            "C_pk_F": {"min": 0.0},
            "V0_V": {"min": 1e-9},
            "V_off_V": {},
        }

    def guess(self, V, C):
        """Peak position from the largest reading; V0 by a scan in which C_inf and C_pk are
        the linear least-squares solution for each trial V0 (the model is linear in them)."""
        V = np.asarray(V, dtype=float)
        C = np.asarray(C, dtype=float)
        V_off = float(V[np.argmax(C)])
        span = float(np.ptp(V)) or 1.0
        trials = np.geomspace(span / 100.0, span * 3.0, 60)
        s = sech2((V[None, :] - V_off) / trials[:, None])
        C_inf, C_pk, ssr = scan_two_term(1.0 - s, s, C)
        i = int(np.argmin(ssr))
        if not np.isfinite(ssr[i]):
            return {"C_inf_F": 0.1 * float(C.max()), "C_pk_F": float(C.max()),
                    "V0_V": span / 3.0, "V_off_V": V_off}
        return {"C_inf_F": float(C_inf[i]), "C_pk_F": float(C_pk[i]), "V0_V": float(trials[i]),
                "V_off_V": V_off}

    def data_bounds(self, V, C):
        V = np.asarray(V, dtype=float)
        span = float(np.ptp(V)) or 1.0
        C_max = float(np.max(C))
        return {"V_off_V": (float(V.min()) - span, float(V.max()) + span),
                "C_pk_F": (0.0, 100.0 * C_max), "V0_V": (1e-9, 100.0 * span)}

    def check_params(self, params):
        super().check_params(params)
        if np.any(np.asarray(params["C_pk_F"]) <= 0):
            raise ModelError("parameter 'C_pk_F' must be > 0 (peak capacitance)")
        if np.any(np.asarray(params["C_inf_F"]) < 0):
            raise ModelError("parameter 'C_inf_F' must be >= 0 (high-field capacitance)")
        if np.any(np.asarray(params["V0_V"]) <= 0):
            raise ModelError("parameter 'V0_V' must be > 0 (width of the sech^2 peak)")
