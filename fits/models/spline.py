"""Regression spline: a cubic spline with a few knots, fitted by least squares, never extrapolated.

For curves no compact law follows (a flat top, a corner near the turning point, two slopes):
the flexible candidate of model="auto" beside the polynomial, with local support, so a
misfit at one end does not bend the other. C(V) is the not-a-knot cubic spline
(scipy.interpolate.CubicSpline, de Boor's end condition) through the values C0_F..C{K-1}_F at
K knots V0_V..V{K-1}_V spread evenly over the measured range; for fixed knots C is linear in
the values, so a fit is exact weighted linear least squares and its leave-one-out residuals
are exact (fits.fitting). Outside the first..last knot C, Q and W are NaN (fits.Curve turns
that into fits.OutOfRange): the curve is the measured range only.

Knots. `variants()` offers K = 4 .. n_distinct - 2 (at least two degrees of freedom left
over the distinct biases, as for the polynomial), up to MAX_KNOTS; the fitter picks among
them by leave-one-out prediction error and refuses a K whose curve turns between the points
where the data do not (the same fine-grid check as the polynomial's).

Q and W are the exact antiderivatives of the piecewise cubic; SPICE writes the piecewise
quartic charge as nested ngspice ternaries, as the table model does (fits.models.table),
holding C at its end values beyond the knots in the netlist only.
"""

from __future__ import annotations

import functools

import numpy as np
from scipy.interpolate import CubicSpline

from fits.errors import ModelError
from fits.models.base import Variant
from fits.models.table import TableModel

MAX_KNOTS = 12
MIN_KNOTS = 4  # not-a-knot needs 4 knots for a cubic of its own on each interval


class SplineModel(TableModel):
    name = "spline"
    title = "regression spline: not-a-knot cubic through K fitted knot values"
    fitted = True
    linear = True  # C is linear in the knot values (the knot biases are fixed)
    analytic_jacobian = True
    min_distinct = MIN_KNOTS + 2  # two degrees of freedom left at the fewest knots

    def __init__(self, n_points: int = MIN_KNOTS):
        n_points = int(n_points)
        if n_points < MIN_KNOTS:
            raise ModelError(f"a regression spline needs at least {MIN_KNOTS} knots")
        super().__init__(n_points)

    @staticmethod
    def _pchip(V, C):
        # the interpolant of this model (the table's name for it): not-a-knot cubic spline
        return CubicSpline(V, C, bc_type="not-a-knot", extrapolate=False)

    def _basis(self, V, knots) -> np.ndarray:
        """dC/dC_k at V: the spline through the unit vectors (NaN outside the knots), built
        as P(V) P(knots)^-1 from power_basis: the K knot values fix the one spline of the
        space through them, so this is that spline, at a fraction of a CubicSpline's cost."""
        V = np.atleast_1d(np.asarray(V, dtype=float))
        knots = np.asarray(knots, dtype=float)
        B = np.linalg.solve(self.power_basis(knots, knots).T, self.power_basis(V, knots).T).T
        B[(V < knots[0]) | (V > knots[-1]) | np.isnan(V)] = np.nan
        return B

    def C(self, V, **params):
        """The spline through the knot values: for one set of parameters as the basis times
        the values (the same not-a-knot spline, without building a CubicSpline each time:
        model choice evaluates every candidate on a fine grid); arrays as a table does."""
        if any(np.ndim(params[n]) for n in self.param_names):
            return super().C(V, **params)
        knots, values = self.points(params)
        V = np.asarray(V, dtype=float)
        return (self._basis(V.ravel(), knots) @ values).reshape(V.shape)

    def jacobian(self, V, params):
        return self.jacobian_of(V, params, self.param_names)

    def jacobian_of(self, V, params, names):
        """dC/dC_k exactly (the basis, one spline through the unit vectors); dC/dV_k, which
        no fit frees (the knots are fixed), by central differences as ModelSpec.jacobian
        takes them, and only when asked for: it costs two splines per knot."""
        knots, values = self.points(params)
        V = np.atleast_1d(np.asarray(V, dtype=float))
        B = self._basis(V, knots)
        cols = []
        for n in names:
            i = self.param_names.index(n)
            if i >= self.n_points:
                cols.append(B[:, i - self.n_points])
                continue
            h = 1e-6 * (abs(knots[i]) if knots[i] != 0.0 else 1.0)
            up, dn = np.array(knots), np.array(knots)
            up[i] += h
            dn[i] -= h
            # extrapolated a hair beyond a moved end knot, so the ends stay finite
            d = (CubicSpline(up, values)(V) - CubicSpline(dn, values)(V)) / (2.0 * h)
            d[np.isnan(B[:, 0])] = np.nan  # outside the knots nothing is defined
            cols.append(d)
        return np.column_stack(cols) if cols else np.empty((V.size, 0))

    @staticmethod
    def power_basis(V, knots) -> np.ndarray:
        """A basis of the same function space, cheap to build: 1, x, x^2, x^3 and (x - k_j)_+^3
        at the breakpoints k_2..k_{K-3} (not-a-knot leaves k_1 and k_{K-2} without one), x
        scaled to the knots' span. Fits in it equal fits in the knot values (same space, so
        the same projection, residuals and hat matrix): the fitter ranks the knot counts with
        it and solves only the chosen one in knot values."""
        knots = np.asarray(knots, dtype=float)
        a, span = float(knots[0]), float(knots[-1] - knots[0])
        x = np.ravel((np.asarray(V, dtype=float) - a) / span)
        k = (knots[2:-2] - a) / span
        out = np.empty((x.size, 4 + k.size))
        out[:, 0] = 1.0
        out[:, 1] = x
        out[:, 2] = x * x
        out[:, 3] = x ** 3
        out[:, 4:] = np.maximum(x[:, None] - k[None, :], 0.0) ** 3
        return out

    # ---- fitting -----------------------------------------------------------------------
    def hints(self):
        return {f"V{i}_V": {"vary": False} for i in range(self.n_points)}

    def guess(self, V, C):
        """Knots spread evenly over the range, values by linear least squares on them."""
        V = np.asarray(V, dtype=float)
        C = np.asarray(C, dtype=float)
        knots = np.linspace(V.min(), V.max(), self.n_points)
        coef, *_ = np.linalg.lstsq(self._basis(V, knots), C, rcond=None)
        return self.params_from_points(knots, coef)

    def variants(self, V, C):
        V = np.asarray(V, dtype=float)
        distinct = np.unique(V)
        top = min(MAX_KNOTS, distinct.size - 2)
        out = []
        for k in range(MIN_KNOTS, top + 1):
            spec = _of_knots(k)
            knots = np.linspace(distinct[0], distinct[-1], k)
            out.append(Variant(spec, {f"V{i}_V": float(v) for i, v in enumerate(knots)},
                               f"spline of {k} knots"))
        return out

    def configure(self, n_points: int | None = None):
        return self if n_points is None else SplineModel(n_points)

    def for_params(self, names):
        names = tuple(names)
        if len(names) < 2 * MIN_KNOTS or len(names) % 2:
            raise ModelError(f"spline parameters are V0_V..V{{K-1}}_V then C0_F..C{{K-1}}_F, "
                             f"K >= {MIN_KNOTS}")
        spec = SplineModel(len(names) // 2)
        if names != spec.param_names:
            raise ModelError(f"spline parameters must be {list(spec.param_names)} in that order")
        return spec

    def check_params(self, params):
        super(TableModel, self).check_params(params)
        xs, _ = self.points(params)
        if np.any(np.diff(xs) <= 0):
            raise ModelError("spline knots V0_V, V1_V, ... must be strictly increasing")


@functools.lru_cache(maxsize=None)
def _of_knots(k: int) -> SplineModel:
    """One spec per knot count (a spec holds nothing but its count and parameter names):
    auto offers every count on every sweep, and building them anew cost more than the
    leave-one-out scores of all of them."""
    return SplineModel(k)
