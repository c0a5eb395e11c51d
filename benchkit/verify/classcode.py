"""Does a part keep its class code? C(0 V, T)/C(0 V, 25 degC) against the EIA-198 band.

EIA-198 class-2 codes bound the change of capacitance relative to 25 degC, at 0 V, over the
code's temperature range (X7R: +-15 % from -55 to +125 degC) [standard: EIA-198]. The check
takes a measured C(V, T) family (fits.family.CurveFamily), evaluates the change at every
measured temperature inside the code's range and on a grid between them (where the family's
interpolation uncertainty counts), and decides each with the rules of `verify`
(benchkit.verify.decision: guarded by default, ILAC-G8:09/2019 and ISO 14253-1).

The family's verdict: any temperature proven outside the band makes it nonconforming (that
needs no more than the one temperature); conforming needs every evaluated temperature
conforming AND the measured temperatures covering the code's whole range (a code promises
the band everywhere in it, and nothing is extrapolated); otherwise not decidable.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from benchkit.errors import UserError
from benchkit.verify.decision import (CONFORMING, NONCONFORMING, NOT_DECIDABLE, PointDecision,
                                      combine_verdicts, decide)

REFERENCE_TEMP_C = 25.0      # EIA-198 reference temperature
COVERAGE_TOL_C = 2.0         # a soak at -55 degC that read -54.2 degC still covers -55 degC
GRID_STEP_C = 5.0


@dataclass(frozen=True)
class TempDecision:
    """The change at one temperature: value and expanded uncertainty in percent, and the decision."""

    temp_C: float
    change_pct: float
    U_pct: float
    measured: bool             # a measured temperature (not interpolated)
    decision: PointDecision

    def to_dict(self) -> dict:
        return {"temp_C": self.temp_C, "change_pct": self.change_pct, "U_pct": self.U_pct,
                "measured": self.measured, **{k: v for k, v in self.decision.to_dict().items()
                                              if k not in ("value", "U")}}


@dataclass
class ClassCheck:
    """Verdict of one family against one class code."""

    code: str
    who: str
    rule: str
    k: float
    code_range_C: tuple[float, float]
    measured_range_C: tuple[float, float]
    covered: bool
    points: list[TempDecision] = field(default_factory=list)
    verdict: str = NOT_DECIDABLE
    reason: str = ""

    @property
    def worst(self) -> TempDecision | None:
        """The temperature whose change lies furthest outside (or closest to) the band."""
        if not self.points:
            return None
        def margin(p: TempDecision) -> float:
            d = p.decision
            return min(p.change_pct - d.tol_lo, d.tol_hi - p.change_pct)
        return min(self.points, key=margin)

    def to_dict(self) -> dict:
        return {"code": self.code, "who": self.who, "rule": self.rule, "k": self.k,
                "code_range_C": list(self.code_range_C),
                "measured_range_C": list(self.measured_range_C), "covered": self.covered,
                "verdict": self.verdict, "reason": self.reason,
                "points": [p.to_dict() for p in self.points]}


def evaluation_temperatures(family, lo_C: float, hi_C: float, step_C: float = GRID_STEP_C):
    """Measured temperatures inside [lo, hi], plus a grid between them; (temp, measured) sorted."""
    t_lo, t_hi = family.temp_range_C
    a, b = max(lo_C - COVERAGE_TOL_C, t_lo), min(hi_C + COVERAGE_TOL_C, t_hi)
    if a > b:
        return []
    measured = [float(t) for t in family.temps_C if a <= t <= b]
    grid = [float(t) for t in np.arange(math.ceil(a / step_C) * step_C, b + 1e-9, step_C)]
    out = {round(t, 9): True for t in measured}
    for t in grid:
        if all(abs(t - m) > 1e-6 for m in measured):
            out.setdefault(round(t, 9), False)
    return sorted(out.items())


def check_class_code(family, code, rule: str = "guarded", k: float = 2.0,
                     V: float = 0.0) -> ClassCheck:
    """Judge one C(V, T) family against a ClassCode (benchkit's parse_class_code)."""
    if not (isinstance(k, (int, float)) and math.isfinite(k) and k > 0):
        raise UserError(f"class check: coverage factor k={k!r} must be a positive number")
    lo, hi = float(code.low_temp_C), float(code.high_temp_C)
    who = " ".join(str(x) for x in (family.part_id, family.sample_id, family.branch) if x)
    t_lo, t_hi = family.temp_range_C
    covered = t_lo <= lo + COVERAGE_TOL_C and t_hi >= hi - COVERAGE_TOL_C
    check = ClassCheck(code.code, who, rule, float(k), (lo, hi), (t_lo, t_hi), covered)
    if not t_lo - COVERAGE_TOL_C <= REFERENCE_TEMP_C <= t_hi + COVERAGE_TOL_C:
        check.reason = (f"no curve at or around the reference {REFERENCE_TEMP_C:g} degC (measured "
                        f"{t_lo:g}..{t_hi:g} degC): the change cannot be referred to it")
        return check
    ref = min(max(REFERENCE_TEMP_C, t_lo), t_hi)
    for T, measured in evaluation_temperatures(family, lo, hi):
        r, u = family.ratio(T, ref, V=V)
        change, U = 100.0 * (r - 1.0), 100.0 * k * u
        band = code.change_bounds_pct(min(max(T, lo), hi))
        check.points.append(TempDecision(T, change, U, measured,
                                         decide(change, U, band[0], band[1], rule)))
    verdicts = [p.decision.verdict for p in check.points]
    if NONCONFORMING in verdicts:
        check.verdict = NONCONFORMING
        w = check.worst
        check.reason = (f"{w.change_pct:+.2f} % +- {w.U_pct:.2f} % at {w.temp_C:.1f} degC is "
                        f"outside the {code.code} band {w.decision.tol_lo:+g}..{w.decision.tol_hi:+g} %")
    elif not check.points:
        check.reason = f"no measured temperature inside the {code.code} range {lo:g}..{hi:g} degC"
    elif not covered:
        check.reason = (f"measured {t_lo:g}..{t_hi:g} degC does not cover the {code.code} range "
                        f"{lo:g}..{hi:g} degC; nothing is extrapolated")
    else:
        check.verdict = combine_verdicts(verdicts)
        if check.verdict == NOT_DECIDABLE:
            undecided = [p.temp_C for p in check.points if p.decision.verdict == NOT_DECIDABLE]
            check.reason = (f"within U of the band edge at {', '.join(f'{t:.1f}' for t in undecided[:4])}"
                            " degC")
        else:
            w = check.worst
            check.reason = (f"every temperature inside the band; closest {w.change_pct:+.2f} % "
                            f"+- {w.U_pct:.2f} % at {w.temp_C:.1f} degC")
    return check


def combine_checks(checks) -> str:
    """Verdict of a part over its samples (as verify combines the points of a sample)."""
    return combine_verdicts([c.verdict for c in checks])


__all__ = ["ClassCheck", "TempDecision", "check_class_code", "combine_checks",
           "evaluation_temperatures", "CONFORMING", "NONCONFORMING", "NOT_DECIDABLE"]
