"""The verification itself: every sample of the claimed part against the claim, point by
point, with a GUM budget per point and the decision rule the customer agreed to.

Per claimed bias V, the measured value is the sample's fitted curve at V (never
extrapolated). Its budget:
- meter accuracy: the stated basic accuracy as a rectangular half-width, relative to the
  reading (JCGM 100:2008 4.3.7);
- fit: the curve's standard uncertainty u_C(V) from the parameter covariance;
- repeatability: the largest of the scatter between repeats (or of the point's readings)
  at the nearest measured bias, and the points' scatter about the fitted curve (which also
  carries any lack of fit). Counting it on top of u_C(V) errs on the large side, on purpose;
- aging correction, when the measurement is referred to the claim's age: rectangular over
  the plausible aging rates of the class.
Combined in quadrature (independent inputs, sensitivity 1), expanded with k.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from benchkit.catalogue.codes import Tolerance
from benchkit.errors import UserError
from benchkit.verify import aging
from benchkit.verify.claims import Claim
from benchkit.verify.decision import NOT_DECIDABLE, PointDecision, combine_verdicts, decide
from benchkit.verify.lot import LotVerdict, lot_verdict, summarise
from benchkit.verify.measured import MeasuredSample, Skipped
from benchkit.verify.sampling import SamplingPlan
from benchkit.verify.uncertainty import DEFAULT_METER_ACCURACY_PCT, Budget, Component, rectangular

# Measurement conditions agree with the claim's when within these tolerances
# [standard: IEC 60384-1 4.2.2 as quoted in detail specifications: frequency +-10 %,
# AC level +-0.2 Vrms at 1.0 Vrms (+-20 %); from memory of those quotes, which differ slightly
# between sources]; temperature within +-2 degC of the claim (our choice, stated in the report).
FREQ_REL_TOL = 0.10
AC_LEVEL_REL_TOL = 0.20
TEMP_TOL_C = 2.0
AC_LEVEL_TOL_SOURCE = ("measuring-voltage tolerance of IEC 60384-1 clause 4.2.2 as quoted in "
                       "detail specifications (1.0 +-0.2 Vrms), from memory")


@dataclass
class PointResult:
    bias_V: float
    claimed_F: float
    measured_F: float | None
    budget: Budget | None
    decision: PointDecision
    age_factor: float = 1.0
    note: str = ""

    def to_dict(self) -> dict:
        return {"bias_V": self.bias_V, "claimed_F": self.claimed_F, "measured_F": self.measured_F,
                "deviation_pct": None if self.measured_F is None
                else 100.0 * (self.measured_F / self.claimed_F - 1.0),
                "age_factor": self.age_factor, "note": self.note,
                "uncertainty": self.budget.to_dict() if self.budget else None,
                "decision": _clean(self.decision.to_dict())}


@dataclass
class SampleResult:
    sample: MeasuredSample
    points: list[PointResult]
    flags: list[str]
    ac_level: dict = field(default_factory=dict)  # ac_level_check(): across the part vs the claim

    @property
    def verdict(self) -> str:
        return combine_verdicts(p.decision.verdict for p in self.points)

    def to_dict(self) -> dict:
        s = self.sample
        curve = s.curve
        return {"sample_id": s.sample_id, "part_id": s.part_id, "origin": s.origin,
                "run_id": s.run_id, "branch": s.branch,
                "curve": {"model": getattr(curve, "model", None),
                          "valid_range_V": list(curve.valid_range_V),
                          "stats": dict(getattr(curve, "stats", {}) or {})},
                "conditions": _clean(dict(s.conditions)), "flags": list(self.flags),
                "ac_level_check": _clean(dict(self.ac_level)),
                "verdict": self.verdict, "points": [p.to_dict() for p in self.points]}


@dataclass
class Verification:
    claim: Claim
    tolerance: Tolerance
    rule: str
    k: float
    meter_accuracy_pct: float
    samples: list[SampleResult]
    skipped: list[Skipped]
    lot: LotVerdict
    plan: SamplingPlan | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def verdict(self) -> str:
        return self.lot.verdict

    def lot_summary(self):
        bias = self.claim.bias_V
        vals = np.array([[np.nan if p.measured_F is None else p.measured_F for p in s.points]
                         for s in self.samples])
        lo, hi = self.claim.limits(bias, self.tolerance)
        return summarise([s.sample.sample_id for s in self.samples], bias, vals,
                         self.claim.C(bias), lo, hi)

    def to_dict(self) -> dict:
        return {
            "format": "benchkit-verification", "version": 1,
            "claim": self.claim.to_dict(),
            "tolerance": self.tolerance.text(),
            "decision_rule": {"rule": self.rule, "coverage_factor_k": self.k},
            "meter_accuracy_pct": self.meter_accuracy_pct,
            "samples": [s.to_dict() for s in self.samples],
            "skipped": [dict(s.__dict__) for s in self.skipped],
            "lot": self.lot.to_dict(),
            "lot_summary": self.lot_summary().to_dict() if self.samples else None,
            "sampling_plan": self.plan.to_dict() if self.plan else None,
            "verdict": self.verdict, "notes": list(self.notes),
        }


def _clean(d: dict) -> dict:
    """JSON-safe: NaN and inf become None."""
    out = {}
    for k, v in d.items():
        if isinstance(v, float) and not math.isfinite(v):
            out[k] = None
        else:
            out[k] = v
    return out


def condition_flags(claim: Claim, conds: dict) -> list[str]:
    """Where the measurement's conditions differ from the claim's (or cannot be compared)."""
    flags = []
    f_m, f_c = conds.get("freq_Hz"), claim.freq_Hz
    if f_m is None:
        flags.append("frequency of the measurement not recorded")
    elif abs(f_m - f_c) > FREQ_REL_TOL * f_c:
        flags.append(f"frequency differs: claim {f_c:g} Hz, measured {f_m:g} Hz")
    a_m, a_c = conds.get("ac_level_Vrms"), claim.ac_level_Vrms
    if a_m is None:
        flags.append("AC level of the measurement not recorded")
    elif abs(a_m - a_c) > AC_LEVEL_REL_TOL * a_c:
        flags.append(f"AC level differs: claim {a_c:g} Vrms, measured {a_m:.3g} Vrms "
                     f"({conds.get('ac_level_source', '')})")
    t_m, t_c = conds.get("temp_C"), claim.temp_C
    if t_c is None:
        flags.append("the claim states no temperature")
    elif t_m is None:
        flags.append("temperature of the measurement not recorded")
    elif abs(t_m - t_c) > TEMP_TOL_C:
        flags.append(f"temperature differs: claim {t_c:g} degC, measured {t_m:.1f} degC")
    age_m, age_c = conds.get("age_h"), claim.age_h
    if age_c is None and age_m is None:
        flags.append("age since the last heat unknown on both sides: not normalised")
    elif age_c is None:
        flags.append(f"the claim states no age; measured at {age_m:g} h: not normalised")
    elif age_m is None:
        flags.append(f"age of the sample not recorded; claim refers to {age_c:g} h: not normalised")
    elif age_m != age_c:
        flags.append(f"age differs: claim {age_c:g} h, measured {age_m:g} h: measurement "
                     f"referred to {age_c:g} h with the aging law")
    if conds.get("points_dropped"):
        flags.append(f"{conds['points_dropped']} point(s) left out of the fit (overload, current "
                     f"limit or bias readback flagged)")
    if conds.get("temp_change_points"):
        flags.append(f"{conds['temp_change_points']} point(s) flagged for a temperature change "
                     f"during the sweep")
    return flags


def ac_level_check(claim: Claim, conds: dict) -> dict:
    """The level across the part (lowest..highest over the points used, and their mean) beside
    the claim's AC level, and whether any of it lies outside the measuring-voltage tolerance.

    Why: the meter sets its source level, but a capacitor of low impedance takes only part of
    it (the source resistance divides it), and class-2 capacitance rises with the AC level
    (science notes: Rayleigh behaviour), so a reader must see both levels side by side."""
    claim_V = float(claim.ac_level_Vrms)
    mean = conds.get("ac_level_Vrms")
    lo = conds.get("ac_level_dut_min_Vrms", mean)
    hi = conds.get("ac_level_dut_max_Vrms", mean)
    tol_V = AC_LEVEL_REL_TOL * claim_V
    out = {"claim_Vrms": claim_V, "tolerance_Vrms": tol_V, "tolerance_source": AC_LEVEL_TOL_SOURCE,
           "min_Vrms": lo, "max_Vrms": hi, "mean_Vrms": mean,
           "set_Vrms": conds.get("ac_level_set_Vrms"), "source": conds.get("ac_level_source"),
           "within_tolerance": None}
    if mean is None:
        out["text"] = "AC level of the measurement not recorded: not compared with the claim's"
        return out
    lo = mean if lo is None else lo
    hi = mean if hi is None else hi
    within = all(abs(x - claim_V) <= tol_V for x in (lo, hi, mean))
    out.update(min_Vrms=lo, max_Vrms=hi, within_tolerance=within)
    span = f"{lo:.3g} Vrms" if abs(hi - lo) < 5e-4 * claim_V else f"{lo:.3g}\u2013{hi:.3g} Vrms"
    rel = 100.0 * (mean / claim_V - 1.0)
    side = "below" if rel < 0 else "above"
    source = conds.get("ac_level_source") or "source not stated"
    where = ("across the part" if source.startswith("level across the part")
             else f"({source})")
    text = (f"{span} {where} (mean {mean:.3g} Vrms, {abs(rel):.1f} % {side} the claim's "
            f"{claim_V:g} Vrms)")
    if within:
        text += f"; within the tolerance of \u00b1{tol_V:.2g} Vrms"
    else:
        text += (f"; NOTE: beyond the tolerance of \u00b1{tol_V:.2g} Vrms, so the samples were not "
                 f"measured at the claim's level and class-2 capacitance depends on it")
    out["text"] = text
    return out


def condition_mismatches(claim: Claim, conds: dict) -> list[str]:
    """The conditions (frequency, AC level, temperature) at which the claim and the
    measurement differ beyond the tolerances above. A claim at other conditions says nothing
    about this measurement: class-2 capacitance moves with each of them [common practice;
    science notes: AC level (Rayleigh behaviour), temperature (EIA-198 class codes)]."""
    out = []
    f_m, a_m, t_m = conds.get("freq_Hz"), conds.get("ac_level_Vrms"), conds.get("temp_C")
    if f_m is not None and abs(f_m - claim.freq_Hz) > FREQ_REL_TOL * claim.freq_Hz:
        out.append(f"frequency {f_m:g} Hz measured, {claim.freq_Hz:g} Hz claimed")
    if a_m is not None and abs(a_m - claim.ac_level_Vrms) > AC_LEVEL_REL_TOL * claim.ac_level_Vrms:
        out.append(f"AC level {a_m:.3g} Vrms measured, {claim.ac_level_Vrms:g} Vrms claimed")
    if t_m is not None and claim.temp_C is not None and abs(t_m - claim.temp_C) > TEMP_TOL_C:
        out.append(f"temperature {t_m:.1f} degC measured, {claim.temp_C:g} degC claimed")
    return out


def verify(claim: Claim, samples: list[MeasuredSample], skipped: list[Skipped],
           tolerance: Tolerance, rule: str = "guarded", k: float = 2.0,
           meter_accuracy_pct: float = DEFAULT_METER_ACCURACY_PCT,
           aging_k_pct: float | None = None, plan: SamplingPlan | None = None,
           accept_other_conditions: bool = False) -> Verification:
    """Judge every sample at every claimed bias; then the lot.

    A sample measured at other conditions than the claim's is not decidable (its points are
    shown, not judged), unless `accept_other_conditions` (the operator's explicit choice,
    recorded in the report's notes and flags)."""
    if not (meter_accuracy_pct >= 0 and math.isfinite(meter_accuracy_pct)):
        raise UserError("meter accuracy must be a number >= 0 (percent of reading)")
    results = []
    bias = claim.bias_V
    claimed = np.atleast_1d(claim.C(bias))
    lo_all, hi_all = claim.limits(bias, tolerance)
    for s in samples:
        flags = condition_flags(claim, s.conditions)
        class_code = s.part.get("class_code")
        age_m, age_c = s.conditions.get("age_h"), claim.age_h
        normalise = age_m is not None and age_c is not None and age_m != age_c
        f_age, u_age_rel, age_note = 1.0, 0.0, ""
        if normalise:
            k_typ = aging.typical_rate_pct(class_code) if aging_k_pct is None else aging_k_pct
            f_age = aging.aging_factor(age_m, age_c, k_typ)
            if aging_k_pct is None:
                k_lo, k_hi = aging.rate_range_pct(class_code)
                fs = [aging.aging_factor(age_m, age_c, kk) for kk in (k_lo, k_hi)]
                u_age_rel = rectangular((max(fs) - min(fs)) / 2.0) / f_age
                age_note = (f"aging {age_m:g} h -> {age_c:g} h, k = {k_typ:g} %/decade "
                            f"(typical for {class_code or 'class 2'}), spread {k_lo:g}..{k_hi:g}")
            else:
                age_note = f"aging {age_m:g} h -> {age_c:g} h, k = {k_typ:g} %/decade (given)"
        lo_V, hi_V = s.curve.valid_range_V
        u_resid = s.residual_u_F()
        pts = []
        for j, V in enumerate(bias):
            V = float(V)
            if not (lo_V <= V <= hi_V):
                d = decide(math.nan, math.nan, float(lo_all[j]), float(hi_all[j]), rule)
                pts.append(PointResult(V, float(claimed[j]), None, None, d, 1.0,
                                       f"outside the measured range {lo_V:g}..{hi_V:g} V"))
                continue
            raw = float(s.curve.C(V))
            x = raw * f_age
            comps = [Component("meter accuracy", rectangular(meter_accuracy_pct / 100.0 * x),
                               evaluation="type B, rectangular",
                               note=f"{meter_accuracy_pct:g} % of reading, half-width")]
            u_fit = _u_fit(s.curve, V) * f_age
            comps.append(Component("fit u_C(V)", u_fit, evaluation="type A, fit covariance",
                                   note=f"model {getattr(s.curve, 'model', '?')}"))
            u_rep, how = (s.points.repeat_u_F(V) if s.points is not None
                          else (0.0, "not available from a curve document"))
            u_rep *= f_age
            u_res = u_resid * f_age
            if u_res > u_rep:
                u_rep, how = u_res, "scatter of the points about the fitted curve"
            comps.append(Component("repeatability", u_rep, evaluation="type A", note=how))
            if normalise:
                comps.append(Component("aging correction", u_age_rel * x,
                                       evaluation="type B, rectangular", note=age_note))
            b = Budget(comps, k)
            d = decide(x, b.U, float(lo_all[j]), float(hi_all[j]), rule)
            pts.append(PointResult(V, float(claimed[j]), x, b, d, f_age, age_note))
        if not any(p.measured_F is not None for p in pts):
            flags.append("no claimed bias lies inside the measured range")
        other = condition_mismatches(claim, s.conditions)
        if other and accept_other_conditions:
            flags.append("judged at other conditions by the operator's override "
                         f"(--accept-other-conditions): {'; '.join(other)}")
        elif other:
            flags.append(f"not decidable: measured at other conditions ({'; '.join(other)}); "
                         "measure at the claim's conditions, or override with --accept-other-conditions")
            for j, p in enumerate(pts):
                p.decision = decide(math.nan, math.nan, float(lo_all[j]), float(hi_all[j]), rule)
                p.note = "; ".join(filter(None, [p.note, "conditions differ from the claim's"]))
        results.append(SampleResult(s, pts, flags, ac_level_check(claim, s.conditions)))
    lv = lot_verdict([r.verdict for r in results], plan)
    notes = []
    if any(p.decision.verdict == NOT_DECIDABLE and p.measured_F is None
           for r in results for p in r.points):
        notes.append("points outside a sample's measured range are not decidable: curves are "
                     "never extrapolated")
    if any(condition_mismatches(claim, r.sample.conditions) for r in results):
        notes.append("OVERRIDE: samples measured at other conditions than the claim's were judged "
                     "as if at the claim's (--accept-other-conditions)" if accept_other_conditions
                     else "samples measured at other conditions than the claim's are not decidable")
    return Verification(claim, tolerance, rule, k, meter_accuracy_pct, results, skipped, lv,
                        plan, notes)


def _u_fit(curve, V: float) -> float:
    try:
        u = float(curve.u_C(V))
    except Exception:  # noqa: BLE001 - a curve without covariance has no fit component
        return 0.0
    return u if math.isfinite(u) and u >= 0 else 0.0
