"""Decision rules: is a measured value inside its tolerance, given its expanded uncertainty?

Two rules, named as in ILAC-G8:09/2019:
- "simple": simple acceptance, guard band w = 0: accept inside the tolerance limits, reject
  outside. Binary; up to 50 % chance of a false accept right at a limit.
- "guarded": guarded acceptance with w = U (acceptance limit AL = TL - w inside each limit,
  at most about 2.5 % false accept), and the ISO 14253-1 zones for the other side:
  nonconformity is proven only outside the tolerance widened by U. Between the two, the point
  is "not decidable".
Each point also carries the ILAC-G8 non-binary statement (pass, conditional pass, conditional
fail, fail), whatever the rule. ISO/IEC 17025:2017 clause 7.1.3: the rule is agreed with the
customer, so it is always printed with the verdict.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

from benchkit.errors import UserError

CONFORMING = "conforming"
NONCONFORMING = "nonconforming"
NOT_DECIDABLE = "not decidable"
VERDICTS = (CONFORMING, NONCONFORMING, NOT_DECIDABLE)
RULES = ("simple", "guarded")

RULE_TEXT = {
    "simple": ("simple acceptance (ILAC-G8:09/2019 4.2.1): guard band w = 0; a point conforms "
               "when the measured value lies inside the tolerance limits"),
    "guarded": ("guarded acceptance (ILAC-G8:09/2019 4.2.2) with w = U: a point conforms inside "
                "the acceptance limits AL = TL -/+ U; it is nonconforming only outside TL widened "
                "by U (ISO 14253-1); between, it is not decidable"),
}


@dataclass(frozen=True)
class PointDecision:
    """The decision on one value: verdict under the rule, the ILAC-G8 statement, the limits used."""

    value: float
    U: float
    tol_lo: float
    tol_hi: float
    accept_lo: float
    accept_hi: float
    reject_lo: float
    reject_hi: float
    rule: str
    verdict: str
    statement: str

    def to_dict(self) -> dict:
        return asdict(self)


def acceptance_limits(tol_lo: float, tol_hi: float, U: float, rule: str) -> tuple[float, float]:
    """AL_lo, AL_hi: the tolerance limits moved inwards by the guard band w (0 or U)."""
    w = guard_band(U, rule)
    return (tol_lo + w, tol_hi - w)


def guard_band(U: float, rule: str) -> float:
    """w = 0 for simple acceptance, w = U for guarded acceptance [standard: ILAC-G8:09/2019]."""
    _check_rule(rule)
    return 0.0 if rule == "simple" else float(U)


def _check_rule(rule: str) -> None:
    if rule not in RULES:
        raise UserError(f"decision rule {rule!r} unknown: use one of {', '.join(RULES)}")


def statement(value: float, U: float, tol_lo: float, tol_hi: float) -> str:
    """ILAC-G8:09/2019 non-binary statement: pass / conditional pass / conditional fail / fail."""
    if tol_lo + U <= value <= tol_hi - U:
        return "pass"
    if tol_lo <= value <= tol_hi:
        return "conditional pass"
    if tol_lo - U <= value <= tol_hi + U:
        return "conditional fail"
    return "fail"


def decide(value: float, U: float, tol_lo: float, tol_hi: float, rule: str = "guarded") -> PointDecision:
    """Decide one measured value with expanded uncertainty U against [tol_lo, tol_hi]."""
    _check_rule(rule)
    if tol_lo > tol_hi:
        raise UserError(f"tolerance limits reversed: lower {tol_lo!r} above upper {tol_hi!r}")
    if not (math.isfinite(value) and math.isfinite(U)) or U < 0:
        # no usable measurement: nothing can be decided
        return PointDecision(value, U, tol_lo, tol_hi, math.nan, math.nan, math.nan, math.nan,
                             rule, NOT_DECIDABLE, "no measurement")
    al_lo, al_hi = acceptance_limits(tol_lo, tol_hi, U, rule)
    if rule == "simple":
        rj_lo, rj_hi = tol_lo, tol_hi
        verdict = CONFORMING if tol_lo <= value <= tol_hi else NONCONFORMING
    else:
        rj_lo, rj_hi = tol_lo - U, tol_hi + U
        if al_lo <= value <= al_hi:
            verdict = CONFORMING
        elif value < rj_lo or value > rj_hi:
            verdict = NONCONFORMING
        else:
            verdict = NOT_DECIDABLE
    return PointDecision(float(value), float(U), float(tol_lo), float(tol_hi), al_lo, al_hi,
                         rj_lo, rj_hi, rule, verdict, statement(value, U, tol_lo, tol_hi))


def combine_verdicts(verdicts) -> str:
    """Verdict of a set of points (one sample): any nonconforming point makes it nonconforming;
    otherwise any undecided point leaves it not decidable; otherwise conforming.
    An empty set decides nothing."""
    vs = list(verdicts)
    for v in vs:
        if v not in VERDICTS:
            raise ValueError(f"unknown verdict {v!r}")
    if not vs:
        return NOT_DECIDABLE
    if NONCONFORMING in vs:
        return NONCONFORMING
    if NOT_DECIDABLE in vs:
        return NOT_DECIDABLE
    return CONFORMING
