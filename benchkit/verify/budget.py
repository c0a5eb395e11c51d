"""Effective capacitance at an operating point: what is left of the label value under DC bias,
at temperature, after aging, at the edge of the tolerance.

Each effect is one factor with a nominal, a typical and a worst-case value, so the chain is
shown and multiplies to the answer. The DC-bias factor is taken as the ratio C(V)/C(0) of a
measured curve, so the sample's own tolerance and age cancel out of it and are applied once,
from the tolerance letter and the aging law.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from benchkit.catalogue.codes import REFERENCE_TEMP_C, Tolerance, parse_class_code
from benchkit.errors import UserError
from benchkit.verify import aging

CAUTIONS = (
    "Verify the effective capacitance on the bench at your own bias, temperature, frequency "
    "and AC level before relying on it.",
    "Follow the part's data sheet and your local design practice: this budget multiplies "
    "independent worst cases and knows nothing the data sheet says beyond its codes.",
    "DC bias and temperature interact (the temperature behaviour under bias differs from the "
    "class-code band, which is stated at 0 V).",
)


@dataclass(frozen=True)
class Factor:
    """One effect on the capacitance, as a multiplier of the nominal value."""

    name: str
    nominal: float
    typical: float
    worst: float
    basis: str

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass
class OperatingPointBudget:
    nominal_C_F: float
    bias_V: float
    temp_C: float
    age_h: float
    factors: list[Factor]
    need_F: float | None = None
    resistor_ohm: float | None = None
    notes: list[str] = field(default_factory=list)
    charge_time_s: dict | None = None

    def _product(self, which: str) -> float:
        p = 1.0
        for f in self.factors:
            p *= getattr(f, which)
        return p

    @property
    def nominal_F(self) -> float:
        return self.nominal_C_F * self._product("nominal")

    @property
    def typical_F(self) -> float:
        return self.nominal_C_F * self._product("typical")

    @property
    def worst_F(self) -> float:
        return self.nominal_C_F * self._product("worst")

    @property
    def parallel_count(self) -> int | None:
        if self.need_F is None:
            return None
        return parallel_count(self.need_F, self.worst_F)

    def tau_s(self) -> dict | None:
        """Small-signal RC time constant R*C_eff at the operating point."""
        if self.resistor_ohm is None:
            return None
        return {k: self.resistor_ohm * v for k, v in
                (("nominal", self.nominal_F), ("typical", self.typical_F), ("worst", self.worst_F))}

    def to_dict(self) -> dict:
        return {
            "nominal_C_F": self.nominal_C_F, "bias_V": self.bias_V, "temp_C": self.temp_C,
            "age_h": self.age_h, "factors": [f.to_dict() for f in self.factors],
            "effective_C_F": {"nominal": self.nominal_F, "typical": self.typical_F,
                              "worst": self.worst_F},
            "need_F": self.need_F, "parallel_count_worst_case": self.parallel_count,
            "resistor_ohm": self.resistor_ohm, "tau_s": self.tau_s(),
            "charge_time_s": self.charge_time_s,
            "notes": list(self.notes), "cautions": list(CAUTIONS),
        }


def parallel_count(need_F: float, per_part_F: float) -> int:
    """Smallest n with n*per_part_F >= need_F."""
    if not (need_F > 0 and math.isfinite(need_F)):
        raise UserError(f"needed capacitance must be a positive number of farads, got {need_F!r}")
    if not (per_part_F > 0 and math.isfinite(per_part_F)):
        raise UserError("the worst-case capacitance per part is not positive: no count of parts "
                        "in parallel meets the need")
    n = max(1, math.ceil(need_F / per_part_F))
    while n * per_part_F < need_F:
        n += 1
    while n > 1 and (n - 1) * per_part_F >= need_F:
        n -= 1
    return n


def tolerance_factor(tol: Tolerance, nominal_C_F: float, letter_text: str) -> Factor:
    lo, _ = tol.relative_limits(nominal_C_F)
    return Factor("tolerance", 1.0, 1.0, lo,
                  f"tolerance {letter_text}: lowest value allowed at 1000 h (IEC 60062 letter; "
                  f"EIA-198-1 1.1.2 reference age)")


def bias_factor(curves, bias_V: float, k: float = 2.0) -> Factor:
    """C(V)/C(0) from measured curves: typical = mean over the curves, worst = lowest
    (C(V) - k*u_C(V))/C(0) over them. No extrapolation beyond any curve's range."""
    if not curves:
        raise UserError("no DC-bias curve for this part: measure it or add one to the library")
    ratios, worsts, names = [], [], []
    for c in curves:
        lo, hi = c.valid_range_V
        if not (lo <= bias_V <= hi):
            raise UserError(f"bias {bias_V:g} V is outside the measured range {lo:g}..{hi:g} V of "
                            f"a library curve ({_curve_name(c)}); curves are never extrapolated")
        c0 = float(c.C(0.0)) if lo <= 0.0 <= hi else float(c.C0_F)
        cv = float(c.C(bias_V))
        u = _safe_u(c, bias_V)  # a curve with no covariance (a table) has no fit uncertainty
        ratios.append(cv / c0)
        worsts.append((cv - k * u) / c0)
        names.append(_curve_name(c))
    basis = (f"DC bias {bias_V:g} V: C(V)/C(0) of {len(curves)} measured curve(s) "
             f"({', '.join(names)}); typical = mean, worst = lowest ratio minus k = {k:g} "
             f"times the fit's standard uncertainty")
    return Factor("DC bias", 1.0, float(np.mean(ratios)), float(min(worsts)), basis)


def _curve_name(c) -> str:
    src = getattr(c, "source", None) or {}
    sample = src.get("sample_id") or getattr(c, "sample_id", None) or "?"
    return f"sample {sample}, model {getattr(c, 'model', '?')}"


def temperature_factor(class_code: str, temp_C: float,
                       measured: tuple[float, float] | None = None,
                       measured_basis: str = "") -> Factor:
    """Temperature effect relative to 25 degC: measured (typical, worst) when the library has
    it, else the class code's bound (EIA-198), typical then taken as no change."""
    if measured is not None:
        return Factor("temperature", 1.0, float(measured[0]), float(measured[1]), measured_basis)
    code = parse_class_code(class_code)
    if float(temp_C) == 25.0:
        return Factor("temperature", 1.0, 1.0, 1.0, "25 degC is the reference temperature of the code")
    lo_pct, hi_pct = code.change_bounds_pct(temp_C)
    return Factor("temperature", 1.0, 1.0, 1.0 + lo_pct / 100.0,
                  f"{code.code} at {temp_C:g} degC: code bound {lo_pct:+g}/{hi_pct:+g} % (EIA-198; "
                  f"measured at 0 V); typical not known from the code, taken as no change")


def aging_factor(class_code: str, age_h: float, k_pct: float | None = None) -> Factor:
    """Aging from the 1000 h the tolerance refers to, to age_h (EIA-198-1 1.1.2)."""
    ref = aging.REFERENCE_AGE_H
    k_typ = aging.typical_rate_pct(class_code) if k_pct is None else float(k_pct)
    k_lo, k_hi = aging.rate_range_pct(class_code) if k_pct is None else (k_typ, k_typ)
    typical = aging.aging_factor(ref, age_h, k_typ)
    worst = min(aging.aging_factor(ref, age_h, k) for k in (k_lo, k_hi))
    src = "given" if k_pct is not None else "typical for the code, common practice"
    return Factor("aging", 1.0, typical, worst,
                  f"C(t) = C(t1)*(1 - k/100*log10(t/t1)), t1 = {aging.T1_H:g} h, from {ref:g} h to "
                  f"{age_h:g} h; k = {k_typ:g} %/decade ({src}), worst over {k_lo:g}..{k_hi:g}")


def charge_time(C_of_V, resistor_ohm: float, step_V: float, fraction: float = 1 - math.exp(-1)) -> float:
    """Time to charge a voltage-dependent capacitor from 0 V to fraction*step_V through R from a
    step source: t = R * integral_0^{fraction*Vs} C(v)/(Vs - v) dv (i = C(v) dv/dt = (Vs - v)/R)."""
    if not (0 < fraction < 1):
        raise UserError("charge fraction must be between 0 and 1")
    vs = float(step_V)
    if vs <= 0:
        raise UserError("the charging step must be a positive voltage")
    from scipy import integrate  # loaded when asked: the CLI starts without scipy

    value, _ = integrate.quad(lambda v: float(C_of_V(v)) / (vs - v), 0.0, fraction * vs, limit=200)
    return float(resistor_ohm) * value


def operating_point(nominal_C_F: float, tolerance: Tolerance, tolerance_text: str, class_code: str,
                    bias_curves, bias_V: float, temp_C: float = 25.0, age_h: float | None = None,
                    need_F: float | None = None, resistor_ohm: float | None = None,
                    measured_temp: tuple[float, float] | None = None, measured_temp_basis: str = "",
                    aging_k_pct: float | None = None, k: float = 2.0) -> OperatingPointBudget:
    """Build the chain: tolerance x DC bias x temperature x aging."""
    if not (nominal_C_F > 0 and math.isfinite(nominal_C_F)):
        raise UserError(f"nominal capacitance must be positive, got {nominal_C_F!r}")
    if resistor_ohm is not None and not (resistor_ohm > 0 and math.isfinite(resistor_ohm)):
        raise UserError(f"resistor must be a positive number of ohms, got {resistor_ohm!r}")
    age = aging.REFERENCE_AGE_H if age_h is None else float(age_h)
    factors = [
        tolerance_factor(tolerance, nominal_C_F, tolerance_text),
        bias_factor(bias_curves, float(bias_V), k=k),
        temperature_factor(class_code, float(temp_C), measured_temp, measured_temp_basis),
        aging_factor(class_code, age, aging_k_pct),
    ]
    notes = []
    if age_h is None:
        notes.append("age not given: taken as the 1000 h the tolerance refers to")
    b = OperatingPointBudget(float(nominal_C_F), float(bias_V), float(temp_C), age, factors,
                             need_F, resistor_ohm, notes)
    if resistor_ohm is not None and bias_V > 0 and all(c.valid_range_V[0] <= 0.0 for c in bias_curves):
        def mean_C(v):
            return float(np.mean([float(c.C(v)) for c in bias_curves]))
        scale = b.typical_F / mean_C(bias_V)  # tolerance, temperature, aging on top of the shape
        t63 = charge_time(lambda v: scale * mean_C(v), resistor_ohm, bias_V)
        b.charge_time_s = {"typical_to_63pct": t63,
                           "basis": "large-signal charge from 0 V to 63.2 % of the bias step "
                                    "through R, integrating the typical C(v) (mean curve)"}
    return b


TEMP_MATCH_C = 2.0  # a stored curve counts as taken "at" a temperature within +-2 degC (our choice)
MEASURED_ORIGINS = ("measured", "lot summary")


def _covers(c, V: float) -> bool:
    lo, hi = c.valid_range_V
    return lo <= V <= hi


def from_library(lib, part_id: str, bias_V: float, temp_C: float = 25.0,
                 age_h: float | None = None, need_F: float | None = None,
                 resistor_ohm: float | None = None, aging_k_pct: float | None = None,
                 k: float = 2.0) -> tuple[object, OperatingPointBudget]:
    """The budget of a library part: its catalogue entry, its measured curves at 25 degC for the
    DC-bias factor, and measured curves at temp_C (when there are any covering the bias) for
    the temperature factor; otherwise the class code's bound."""
    from benchkit.catalogue.codes import parse_tolerance

    part = lib.part(part_id)
    for name in ("nominal_C_F", "tolerance", "class_code"):
        if getattr(part, name) in (None, ""):
            raise UserError(f"library part {part_id}: field {name!r} is empty; the budget needs it")
    records = [r for r in lib.curves(part_id) if r.origin in MEASURED_ORIGINS]
    at_ref = [r for r in records if abs(r.temp_C - REFERENCE_TEMP_C) <= TEMP_MATCH_C]
    if not at_ref:
        raise UserError(f"library part {part_id}: no measured curve at {REFERENCE_TEMP_C:g} degC "
                        f"for the DC-bias factor; add a run with 'benchkit library add'")
    ref_curves = [r.curve for r in at_ref if r.origin == "measured"] or [r.curve for r in at_ref]
    measured_temp, basis = None, ""
    if abs(float(temp_C) - REFERENCE_TEMP_C) > TEMP_MATCH_C:
        at_T = [r.curve for r in records if abs(r.temp_C - float(temp_C)) <= TEMP_MATCH_C
                and _covers(r.curve, bias_V)]
        ref_ok = [c for c in ref_curves if _covers(c, bias_V)]
        if at_T and ref_ok:
            c_ref = float(np.mean([float(c.C(bias_V)) for c in ref_ok]))
            c_T = np.array([float(c.C(bias_V)) for c in at_T])
            u_T = np.array([_safe_u(c, bias_V) for c in at_T])
            measured_temp = (float(np.mean(c_T)) / c_ref, float(np.min(c_T - k * u_T)) / c_ref)
            basis = (f"measured: C({bias_V:g} V) of {len(at_T)} curve(s) at {temp_C:g} degC over "
                     f"the mean of {len(ref_ok)} at {REFERENCE_TEMP_C:g} degC (library); worst = "
                     f"lowest minus k = {k:g} times u_C")
    tol = parse_tolerance(part.tolerance)
    b = operating_point(part.nominal_C_F, tol, tol.text(), part.class_code, ref_curves, bias_V,
                        temp_C, age_h, need_F, resistor_ohm, measured_temp, basis, aging_k_pct, k)
    return part, b


def _safe_u(c, V) -> float:
    try:
        u = float(c.u_C(V))
    except (ValueError, TypeError, AttributeError, np.linalg.LinAlgError):
        return 0.0
    return u if math.isfinite(u) else 0.0
