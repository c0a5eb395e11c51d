"""Polynomial model in a scaled bias x = V/V_scale.

    C(V) = sum_k a_k * x^k,   x = V / V_scale,   V_scale = largest |bias| measured
    Q(V) = V_scale * sum_k a_k * x^(k+1) / (k+1)        (exact integration, Q(0) = 0)
    W(V) = V_scale^2 * sum_k a_k * x^(k+2) / (k+2)

Scaling keeps the monomial basis on [-1, 1] (or [0, 1]) and the fit well conditioned
(scaling to V/V_max as for the even-polynomial permittivity law eps(0)*(1 + a2*E^2 + a4*E^4)).
V_scale_V is stored with the coefficients but never fitted (its covariance row is zero).

Degree. `variants()` offers the flat line (degree 0) and degrees 1..8 (at most
n_distinct_bias - 3, so at least two degrees of freedom are left over the distinct biases);
when the sweep is bipolar and its bias values are symmetric about 0 V it also offers even-only
polynomials (powers 0, 2, 4, ...), since an anhysteretic C(V) is even in V. The fitter picks
among these variants by leave-one-out prediction error, the lowest degree within one standard
error of the best, and refuses a degree whose curve turns between the points where the data
do not (fits.fitting).
"""

from __future__ import annotations

import re

import numpy as np

from fits.errors import ModelError
from fits.models.base import ModelSpec, Variant, spice_number

_COEF = re.compile(r"^a(\d+)_F$")
MAX_DEGREE = 8


def _powers_names(powers) -> tuple[str, ...]:
    return ("V_scale_V",) + tuple(f"a{k}_F" for k in powers)


class PolyModel(ModelSpec):
    name = "poly"
    title = "polynomial in x = V/V_scale"
    analytic_jacobian = True
    linear = True  # C is linear in the coefficients (V_scale_V is fixed)
    nested = True  # its variants are nested column sets (fits.fitting._linear_loo)

    def __init__(self, powers=None, max_degree: int = MAX_DEGREE):
        # powers=None: the degree is chosen by the data; param_names shows the cubic then
        self.chosen = powers is not None
        powers = (0, 1, 2, 3) if powers is None else tuple(sorted(set(int(p) for p in powers)))
        if not powers or powers[0] != 0 or any(p < 0 for p in powers):
            raise ModelError(f"poly powers must be non-negative and include 0, got {powers}")
        self.powers = powers
        self.max_degree = int(max_degree)
        self.param_names = _powers_names(powers)

    @property
    def degree(self) -> int:
        return self.powers[-1]

    @property
    def even(self) -> bool:
        return all(p % 2 == 0 for p in self.powers)

    # ---- maths -----------------------------------------------------------------------
    def _horner(self, x, dense):
        out = 0.0
        for c in reversed(dense):
            out = out * x + c
        return out

    def _dense(self, params, divisor_shift: int):
        dense = [0.0] * (self.degree + 1)
        for k in self.powers:
            dense[k] = params[f"a{k}_F"] / (k + divisor_shift) if divisor_shift else params[f"a{k}_F"]
        return dense

    def C(self, V, **params):
        x = np.asarray(V, dtype=float) / params["V_scale_V"]
        return self._horner(x, self._dense(params, 0)) + 0.0 * x

    def Q(self, V, **params):
        Vs = params["V_scale_V"]
        x = np.asarray(V, dtype=float) / Vs
        return Vs * x * self._horner(x, self._dense(params, 1))

    def W(self, V, **params):
        Vs = params["V_scale_V"]
        x = np.asarray(V, dtype=float) / Vs
        return Vs**2 * x * x * self._horner(x, self._dense(params, 2))

    def jacobian(self, V, params):
        V = np.atleast_1d(np.asarray(V, dtype=float))
        Vs = float(params["V_scale_V"])
        x = V / Vs
        cols = [-sum(k * float(params[f"a{k}_F"]) * x**k for k in self.powers) / Vs]
        cols += [x**k for k in self.powers]
        return np.column_stack(cols)

    def spice_charge(self, params, v):
        self.check_params(params)
        Vs = float(params["V_scale_V"])
        n = spice_number
        x = f"(({v})/{n(Vs)})"
        dense = self._dense({k: float(val) for k, val in params.items()}, 1)
        body = n(dense[-1])
        for c in reversed(dense[:-1]):
            body = f"({n(c)} + {x}*{body})" if c != 0.0 else f"({x}*{body})"
        return f"{n(Vs)}*{x}*{body}"

    # ---- fitting ---------------------------------------------------------------------
    def hints(self):
        return {"V_scale_V": {"vary": False}}

    def guess(self, V, C):
        """Linear least squares in the scaled basis (exact for a linear model)."""
        V = np.asarray(V, dtype=float)
        C = np.asarray(C, dtype=float)
        Vs = float(np.max(np.abs(V))) or 1.0
        x = V / Vs
        coef, *_ = np.linalg.lstsq(np.column_stack([x**k for k in self.powers]), C, rcond=None)
        out = {"V_scale_V": Vs}
        out.update({f"a{k}_F": float(c) for k, c in zip(self.powers, coef)})
        return out

    def variants(self, V, C):
        V = np.asarray(V, dtype=float)
        Vs = float(np.max(np.abs(V))) or 1.0
        fixed = {"V_scale_V": Vs}
        if self.chosen:
            return [Variant(self, fixed, f"poly powers {list(self.powers)}")]
        distinct = np.unique(np.round(V / Vs, 9))
        # keep at least 2 degrees of freedom over the distinct biases (one would leave the
        # residual scatter, and so the uncertainty, resting on a single chi-square draw)
        top = max(1, min(self.max_degree, distinct.size - 3))
        # degree 0 is the flat line: a part flat within noise (class 1) is reported as flat
        # (from 3 distinct biases: two readings say nothing about flatness)
        out = [Variant(PolyModel([0]), fixed, "poly degree 0 (flat)")] if distinct.size >= 3 else []
        out += [Variant(PolyModel(range(d + 1)), fixed, f"poly degree {d}") for d in range(1, top + 1)]
        if symmetric_bipolar(V):
            n_abs = np.unique(np.abs(distinct)).size
            m_top = min(self.max_degree // 2, n_abs - 3)
            out += [
                Variant(PolyModel(range(0, 2 * m + 1, 2)), fixed, f"poly even degree {2 * m}")
                for m in range(1, m_top + 1)
            ]
        return out

    def configure(self, degree: int | None = None, even: bool = False, powers=None,
                  max_degree: int | None = None):
        """get("poly", degree=4, even=True) -> powers 0, 2, 4; get("poly") -> data's choice."""
        if powers is None and degree is not None:
            powers = range(0, int(degree) + 1, 2 if even else 1)
        return PolyModel(powers, max_degree=self.max_degree if max_degree is None else max_degree)

    def for_params(self, names):
        names = tuple(names)
        if not names or names[0] != "V_scale_V":
            raise ModelError("poly parameters start with 'V_scale_V'")
        powers = []
        for n in names[1:]:
            m = _COEF.match(n)
            if not m:
                raise ModelError(f"poly parameter '{n}' is not a coefficient name like 'a2_F'")
            powers.append(int(m.group(1)))
        if powers != sorted(set(powers)):
            raise ModelError("poly coefficients must be listed once each, in rising power")
        return PolyModel(powers)

    def check_params(self, params):
        super().check_params(params)
        if np.any(np.asarray(params["V_scale_V"]) <= 0):
            raise ModelError("parameter 'V_scale_V' must be > 0")


def symmetric_bipolar(V, rel_tol: float = 1e-6) -> bool:
    """True when the distinct bias values straddle 0 V and each has its mirror image."""
    V = np.asarray(V, dtype=float)
    Vs = float(np.max(np.abs(V))) or 1.0
    if not (V.min() < -rel_tol * Vs and V.max() > rel_tol * Vs):
        return False
    distinct = np.unique(V)
    mirrored = np.min(np.abs(distinct[:, None] + distinct[None, :]), axis=1)
    return bool(np.all(mirrored <= rel_tol * Vs))
