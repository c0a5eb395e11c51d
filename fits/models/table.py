"""Table model: a monotone-preserving cubic (PCHIP) through given points, never extrapolated.

For supplier claims and lot summaries, where the curve is a list of (bias, capacitance)
points rather than a fitted law. Interpolation is scipy.interpolate.PchipInterpolator
(Fritsch-Carlson shape-preserving cubic Hermite): it never overshoots the points, so a
claimed monotone fall stays monotone. Outside the first..last point C, Q and W are NaN
(fits.Curve turns that into fits.OutOfRange).

Parameters are the points: V0_V..V{n-1}_V (strictly increasing) then C0_F..C{n-1}_F.
Q is the exact antiderivative of the PCHIP piecewise cubic (a piecewise quartic), shifted
so Q(0) = 0; it needs 0 V inside the table. W = V*Q(V) - integral of Q, also exact.

SPICE: spice_charge writes the piecewise quartic as nested ngspice ternaries
(cond ? a : b), one branch per interval, exact inside the table. A simulator needs a value
everywhere, so beyond the end points the expression holds C at the end values (Q continues
linearly). That is the one place a table is extended, and only in the exported netlist.

Evaluating many tables at once (parameter arrays) builds one interpolator per distinct table:
correct, but much slower than the closed-form models.
"""

from __future__ import annotations

import re

import numpy as np
from scipy.interpolate import PchipInterpolator

from fits.errors import ModelError
from fits.models.base import ModelSpec, Variant, spice_number

_NAME = re.compile(r"^([VC])(\d+)_([VF])$")


class TableModel(ModelSpec):
    name = "table"
    title = "table: PCHIP through points, never extrapolated"
    fitted = False

    def __init__(self, n_points: int = 2):
        n_points = int(n_points)
        if n_points < 2:
            raise ModelError("a table needs at least 2 points")
        self.n_points = n_points
        self.param_names = tuple(f"V{i}_V" for i in range(n_points)) + tuple(
            f"C{i}_F" for i in range(n_points)
        )

    # ---- helpers -----------------------------------------------------------------------
    def points(self, params):
        """(bias_V, C_F) arrays of the table's points."""
        V = np.array([float(params[f"V{i}_V"]) for i in range(self.n_points)])
        C = np.array([float(params[f"C{i}_F"]) for i in range(self.n_points)])
        return V, C

    def params_from_points(self, bias_V, C_F) -> dict[str, float]:
        out = {f"V{i}_V": float(v) for i, v in enumerate(bias_V)}
        out.update({f"C{i}_F": float(c) for i, c in enumerate(C_F)})
        return out

    @staticmethod
    def _pchip(V, C):
        return PchipInterpolator(V, C, extrapolate=False)

    def _each(self, V, params, fn):
        """Apply fn(interpolator, V) for one table, or per table for parameter arrays."""
        arrays = [np.asarray(params[n], dtype=float) for n in self.param_names]
        V = np.asarray(V, dtype=float)
        if all(a.ndim == 0 for a in arrays):
            xs, cs = self.points(params)
            return fn(self._pchip(xs, cs), V)
        shape = np.broadcast_shapes(V.shape, *[a.shape for a in arrays])
        Vb = np.broadcast_to(V, shape)
        pb = [np.broadcast_to(a, shape) for a in arrays]
        out = np.empty(shape)
        cache: dict[tuple, PchipInterpolator] = {}
        n = self.n_points
        for idx in np.ndindex(shape):
            key = tuple(float(p[idx]) for p in pb)
            interp = cache.get(key)
            if interp is None:
                interp = cache[key] = self._pchip(np.array(key[:n]), np.array(key[n:]))
            out[idx] = fn(interp, Vb[idx])
        return out

    # ---- maths -------------------------------------------------------------------------
    def C(self, V, **params):
        return self._each(V, params, lambda p, v: p(v))

    def Q(self, V, **params):
        def q(p, v):
            F = p.antiderivative()
            return F(v, extrapolate=False) - F(0.0, extrapolate=False)

        return self._each(V, params, q)

    def W(self, V, **params):
        def w(p, v):
            F = p.antiderivative()
            G = F.antiderivative()
            F0 = F(0.0, extrapolate=False)
            Qv = F(v, extrapolate=False) - F0
            int_Q = G(v, extrapolate=False) - G(0.0, extrapolate=False) - F0 * v
            return v * Qv - int_Q

        return self._each(V, params, w)

    def spice_charge(self, params, v):
        self.check_params(params)
        xs, cs = self.points(params)
        F = self._pchip(xs, cs).antiderivative()
        n = spice_number
        if not xs[0] <= 0.0 <= xs[-1]:
            # Q(0) = 0 needs the table to contain 0 V
            raise ModelError("table does not contain 0 V, so its charge Q(0) = 0 is undefined")
        F0 = float(F(0.0))
        x = f"({v})"
        # beyond the ends: hold C at the end values (Q linear), documented above
        low = f"{n(float(F(xs[0])) - F0)} + {n(cs[0])}*({x} - {n(xs[0])})"
        high = f"{n(float(F(xs[-1])) - F0)} + {n(cs[-1])}*({x} - {n(xs[-1])})"
        pieces = []
        for i in range(xs.size - 1):
            c = F.c[:, i]  # highest power first, in (v - xs[i])
            d = f"({x} - {n(xs[i])})"
            body = n(c[0])
            for coef in c[1:-1]:
                body = f"({body}*{d} + {n(coef)})"
            body = f"({body}*{d} + {n(c[-1] - F0)})"
            pieces.append(body)
        expr = high
        for i in range(xs.size - 2, -1, -1):
            expr = f"(({x} < {n(xs[i + 1])}) ? {pieces[i]} : {expr})"
        return f"(({x} < {n(xs[0])}) ? ({low}) : {expr})"

    # ---- fitting -----------------------------------------------------------------------
    def hints(self):
        hints = {f"V{i}_V": {"vary": False} for i in range(self.n_points)}
        hints.update({f"C{i}_F": {"min": 0.0} for i in range(self.n_points)})
        return hints

    def guess(self, V, C):
        """Knots at the distinct biases (or spread evenly), C from the means at each bias."""
        V = np.asarray(V, dtype=float)
        C = np.asarray(C, dtype=float)
        distinct, inverse = np.unique(V, return_inverse=True)
        means = np.bincount(inverse, weights=C) / np.bincount(inverse)
        knots = distinct if distinct.size == self.n_points else np.linspace(
            distinct[0], distinct[-1], self.n_points)
        return self.params_from_points(knots, np.interp(knots, distinct, means))

    def variants(self, V, C):
        distinct = np.unique(np.asarray(V, dtype=float))
        spec = TableModel(distinct.size)
        fixed = {f"V{i}_V": float(v) for i, v in enumerate(distinct)}
        return [Variant(spec, fixed, f"table of {distinct.size} points")]

    def configure(self, n_points: int | None = None):
        return self if n_points is None else TableModel(n_points)

    def for_params(self, names):
        names = tuple(names)
        if len(names) < 4 or len(names) % 2:
            raise ModelError("table parameters are V0_V..V{n-1}_V then C0_F..C{n-1}_F, n >= 2")
        spec = TableModel(len(names) // 2)
        if names != spec.param_names:
            raise ModelError(
                f"table parameters must be {list(spec.param_names)} in that order"
            )
        return spec

    def check_params(self, params):
        super().check_params(params)
        xs, cs = self.points(params)
        if np.any(np.diff(xs) <= 0):
            raise ModelError("table biases V0_V, V1_V, ... must be strictly increasing")
        if np.any(cs <= 0):
            bad = int(np.argmax(cs <= 0))
            raise ModelError(f"parameter 'C{bad}_F' must be > 0")
