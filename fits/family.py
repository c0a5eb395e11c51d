"""C(V, T): curves of one sample and branch at several temperatures, as one family.

Between two measured temperatures the family interpolates linearly in T, at every bias:
C(V, T) = (1 - s)*C_i(V) + s*C_{i+1}(V), s = (T - T_i)/(T_{i+1} - T_i). Why linear and not a
smoother interpolant: it is linear in the member curves, so the charge is interpolated the
same way, Q(V, T) = (1 - s)*Q_i(V) + s*Q_{i+1}(V), and stays the integral of C (a circuit
export conserves charge at every temperature); and it never overshoots between points.
Outside the measured temperatures the family does not answer (OutOfRange): no extrapolation
in temperature, as none in bias.

Uncertainty (GUM, JCGM 100:2008): the member curves come from separate fits, so their
parameter uncertainties are independent: u^2 = sum w_i^2 u_i^2. Linear interpolation adds
its own error f(T) - p(T) = f''(xi)/2*(T - T_i)*(T - T_{i+1}) [published: the remainder of
linear interpolation, any numerical-analysis text], at most h^2/8*|f''| in an interval of
width h. The family estimates |f''| from second divided differences of the neighbouring
temperatures (the larger one), or with only two temperatures takes half the change across
the interval as the worst case; that bound is a rectangular half-width a, scaled by
4*s*(1 - s) inside the interval, and enters as u = a/sqrt(3) [GUM 4.3.7]. At a measured
temperature it is zero.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from fits._atomic import write_bytes_atomic
from fits.curve import Curve
from fits.document import FAMILY_FORMAT, json_safe
from fits.errors import CurveDocumentError, FitError, OutOfRange

VERSION = 1
INTERPOLATION = "linear-in-T"
#: temperatures closer than this (degC) are one temperature of the family
TEMP_MERGE_C = 1e-6


class CurveFamily:
    """C(V, T) of one sample (or part) and branch; members sorted by temperature."""

    def __init__(self, curves: Iterable[Curve], *, part_id: str | None = None,
                 sample_id: str | None = None, branch: str | None = None,
                 _where: str = "curve family"):
        members = list(curves)
        if not members:
            raise CurveDocumentError(f"{_where}: field 'curves': a family needs at least one curve")
        temps = []
        for i, c in enumerate(members):
            t = c.conditions.get("temp_C")
            if t is None or not math.isfinite(float(t)):
                raise CurveDocumentError(f"{_where}: field 'curves[{i}].conditions.temp_C': "
                                         "each member needs the temperature it was measured at")
            temps.append(float(t))
        order = np.argsort(temps, kind="stable")
        self.curves: list[Curve] = [members[i] for i in order]
        self.temps_C = np.array([temps[i] for i in order])
        if np.any(np.diff(self.temps_C) <= TEMP_MERGE_C):
            k = int(np.argmax(np.diff(self.temps_C) <= TEMP_MERGE_C))
            raise CurveDocumentError(
                f"{_where}: field 'curves': two members at {self.temps_C[k]:g} degC; a family "
                "holds one curve per temperature (pool or pick one first)")
        self.part_id = part_id if part_id is not None else self.curves[0].part_id
        self.sample_id = sample_id if sample_id is not None else self.curves[0].sample_id
        self.branch = branch if branch is not None else self.curves[0].branch

    # ---- ranges --------------------------------------------------------------------------
    @property
    def temp_range_C(self) -> tuple[float, float]:
        return float(self.temps_C[0]), float(self.temps_C[-1])

    def _who(self) -> str:
        return " ".join(str(x) for x in (self.part_id, self.sample_id, self.branch) if x)

    def weights(self, temp_C: float) -> list[tuple[int, float]]:
        """[(member index, weight)] of the linear interpolation at temp_C; OutOfRange outside."""
        T = float(temp_C)
        lo, hi = self.temp_range_C
        tol = 1e-9 * max(1.0, abs(lo), abs(hi))
        if not math.isfinite(T) or T < lo - tol or T > hi + tol:
            raise OutOfRange(f"temperature {T:g} degC is outside the temperatures measured "
                             f"({lo:g} to {hi:g} degC) of {self._who() or 'the family'}; "
                             "no extrapolation in temperature")
        j = int(np.searchsorted(self.temps_C, T))
        if j < len(self.temps_C) and abs(self.temps_C[j] - T) <= tol:
            return [(j, 1.0)]
        if j > 0 and abs(self.temps_C[j - 1] - T) <= tol:
            return [(j - 1, 1.0)]
        i = j - 1
        s = (T - self.temps_C[i]) / (self.temps_C[j] - self.temps_C[i])
        return [(i, 1.0 - s), (j, s)]

    def valid_range_V(self, temp_C: float) -> tuple[float, float]:
        """Bias range in which the family answers at temp_C: where every member used covers it."""
        used = [self.curves[i] for i, _ in self.weights(temp_C)]
        return (max(c.valid_range_V[0] for c in used), min(c.valid_range_V[1] for c in used))

    # ---- values --------------------------------------------------------------------------
    def C(self, V, temp_C: float):
        """Differential capacitance in farads at bias V and temperature temp_C."""
        out = sum(w * np.asarray(self.curves[i].C(V)) for i, w in self.weights(temp_C))
        return float(out) if np.ndim(V) == 0 else np.asarray(out, dtype=float)

    def Q(self, V, temp_C: float):
        """Charge from 0 V to V at temp_C: the same weights as C, so dQ/dV = C exactly."""
        out = sum(w * np.asarray(self.curves[i].Q(V)) for i, w in self.weights(temp_C))
        return float(out) if np.ndim(V) == 0 else np.asarray(out, dtype=float)

    def _interp_half_width(self, V, temp_C: float) -> np.ndarray:
        """a(T) of the module docstring, at each V (0 at a measured temperature)."""
        ws = self.weights(temp_C)
        V = np.asarray(V, dtype=float)
        if len(ws) == 1:
            return np.zeros_like(V)
        (i, _), (j, s) = ws
        h = self.temps_C[j] - self.temps_C[i]
        curv = []
        for a, b, c in ((i - 1, i, j), (i, j, j + 1)):
            if a < 0 or c >= len(self.curves):
                continue
            ta, tb, tc = self.temps_C[[a, b, c]]
            try:
                ca, cb, cc = (np.asarray(self.curves[k].C(V)) for k in (a, b, c))
            except OutOfRange:
                continue    # a neighbour measured over a shorter bias range tells nothing here
            d2 = 2.0 * ((cc - cb) / (tc - tb) - (cb - ca) / (tb - ta)) / (tc - ta)
            curv.append(np.abs(d2))
        if curv:
            bound = np.max(np.stack(curv), axis=0) * h * h / 8.0
        else:
            bound = 0.5 * np.abs(np.asarray(self.curves[j].C(V)) - np.asarray(self.curves[i].C(V)))
        return bound * 4.0 * s * (1.0 - s)

    def u_C(self, V, temp_C: float):
        """Standard uncertainty of C(V, T): member uncertainties plus the interpolation's."""
        var = sum(w * w * np.asarray(self.curves[i].u_C(V)) ** 2 for i, w in self.weights(temp_C))
        var = var + (self._interp_half_width(V, temp_C) / math.sqrt(3.0)) ** 2
        out = np.sqrt(var)
        return float(out) if np.ndim(V) == 0 else np.asarray(out, dtype=float)

    def ratio(self, temp_C: float, ref_temp_C: float = 25.0, V: float = 0.0) -> tuple[float, float]:
        """C(V, T)/C(V, T_ref) and its standard uncertainty, with the member curves shared
        by numerator and denominator correlated as they should be (sensitivities per member)."""
        num_w = dict(self.weights(temp_C))
        den_w = dict(self.weights(ref_temp_C))
        idx = sorted(set(num_w) | set(den_w))
        c = {k: float(self.curves[k].C(V)) for k in idx}
        u = {k: float(self.curves[k].u_C(V)) for k in idx}
        num = sum(num_w[k] * c[k] for k in num_w)
        den = sum(den_w[k] * c[k] for k in den_w)
        var = sum(((num_w.get(k, 0.0) * den - den_w.get(k, 0.0) * num) / den**2) ** 2 * u[k] ** 2
                  for k in idx)
        a_num = float(self._interp_half_width(V, temp_C))
        a_den = float(self._interp_half_width(V, ref_temp_C))
        var += (a_num / math.sqrt(3) / den) ** 2 + (num * a_den / math.sqrt(3) / den**2) ** 2
        return num / den, math.sqrt(var)

    # ---- documents -----------------------------------------------------------------------
    def to_dict(self) -> dict:
        return json_safe({
            "format": FAMILY_FORMAT,
            "version": VERSION,
            "interpolation": INTERPOLATION,
            "temp_range_C": list(self.temp_range_C),
            "part_id": self.part_id,
            "sample_id": self.sample_id,
            "branch": self.branch,
            "curves": [c.to_dict() for c in self.curves],
        })

    def to_json(self, indent: int | None = 2) -> str:
        return json.dumps(self.to_dict(), indent=indent, allow_nan=False) + "\n"

    @classmethod
    def from_dict(cls, d: Any, where: str = "curve family") -> "CurveFamily":
        if not isinstance(d, Mapping):
            raise CurveDocumentError(f"{where}: a curve family is a JSON object")
        if d.get("format") != FAMILY_FORMAT:
            raise CurveDocumentError(f"{where}: field 'format': expected '{FAMILY_FORMAT}', "
                                     f"got {d.get('format')!r}")
        v = d.get("version")
        if not isinstance(v, int) or isinstance(v, bool) or not 1 <= v <= VERSION:
            raise CurveDocumentError(f"{where}: field 'version': this software reads 1 .. "
                                     f"{VERSION}, got {v!r}")
        if d.get("interpolation", INTERPOLATION) != INTERPOLATION:
            raise CurveDocumentError(f"{where}: field 'interpolation': only '{INTERPOLATION}' "
                                     "is known")
        members = d.get("curves")
        if not isinstance(members, list):
            raise CurveDocumentError(f"{where}: field 'curves': must be a list of curve documents")
        curves = [Curve.from_dict(m, f"{where}: curves[{i}]") for i, m in enumerate(members)]
        fam = cls(curves, part_id=d.get("part_id"), sample_id=d.get("sample_id"),
                  branch=d.get("branch"), _where=where)
        rng = d.get("temp_range_C")
        if rng is not None and [float(x) for x in rng] != list(fam.temp_range_C):
            raise CurveDocumentError(f"{where}: field 'temp_range_C': {rng!r} does not match "
                                     f"the members' temperatures {list(fam.temp_range_C)}")
        return fam

    @classmethod
    def from_json(cls, text: str, where: str = "curve family") -> "CurveFamily":
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise CurveDocumentError(f"{where}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
        return cls.from_dict(data, where)

    def save(self, path) -> Path:
        return write_bytes_atomic(path, self.to_json().encode("utf-8"))

    @classmethod
    def load(cls, path) -> "CurveFamily":
        p = Path(path)
        try:
            text = p.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise CurveDocumentError(f"{p}: cannot read the curve family ({exc})") from None
        return cls.from_json(text, where=str(p))

    def __repr__(self) -> str:
        lo, hi = self.temp_range_C
        return f"<CurveFamily {self._who()} {len(self.curves)} curves {lo:g}..{hi:g} degC>"


def group_temperatures(temp_C: Sequence[float], tol_C: float = 2.0) -> np.ndarray:
    """Cluster labels: readings within tol_C of the previous one (sorted) share a temperature.

    A thermometer on the fixture reads a soaked set point with some scatter; readings of one
    soak stay far closer together than two set points of a plan (common practice: plans step
    by 10 degC or more).
    """
    T = np.asarray(temp_C, dtype=float)
    if T.ndim != 1 or not np.all(np.isfinite(T)):
        raise FitError("temp_C: need one finite temperature per point")
    order = np.argsort(T, kind="stable")
    labels = np.empty(T.size, dtype=int)
    label, prev = -1, -math.inf
    for k in order:
        if T[k] - prev > tol_C:
            label += 1
        labels[k] = label
        prev = T[k]
    return labels


def fit_family(bias_V, C_F, temp_C, sigma_F=None, model="auto", *, tol_C: float = 2.0,
               conditions: Mapping | None = None, **labels) -> CurveFamily:
    """Fit each temperature's points on its own (fits.fit_sweep) and join them as a family.

    Each member's conditions.temp_C is the mean reading of its cluster.
    """
    from fits.fitting import fit_sweep

    V = np.asarray(bias_V, dtype=float)
    C = np.asarray(C_F, dtype=float)
    T = np.asarray(temp_C, dtype=float)
    if not (V.shape == C.shape == T.shape):
        raise FitError(f"fit_family: {V.size} bias values, {C.size} capacitances and {T.size} "
                       "temperatures; give one of each per point")
    S = None if sigma_F is None else np.asarray(sigma_F, dtype=float)
    groups = group_temperatures(T, tol_C)
    curves = []
    for g in range(int(groups.max()) + 1):
        m = groups == g
        cond = dict(conditions or {})
        cond["temp_C"] = float(np.mean(T[m]))
        try:
            out = fit_sweep(V[m], C[m], None if S is None else S[m], model=model,
                            conditions=cond, **labels)
        except FitError as exc:
            raise FitError(f"at {cond['temp_C']:.1f} degC: {exc}") from None
        curves.append(out.curve)
    return CurveFamily(curves)


__all__ = ["CurveFamily", "fit_family", "group_temperatures", "INTERPOLATION"]
