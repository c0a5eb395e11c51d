"""Aging of class-2 ceramics: capacitance falls by a fixed fraction per decade of hours since
the last heat above the Curie point, C(t) = C(t1)*(1 - (k/100)*log10(t/t1)).

Used to refer a reading taken at one age to another, chiefly to the 1000 h to which
tolerances refer [standard: EIA-198-1 clause 1.1.2, as quoted]. The law and the rates are
common practice (IEC 60384-22 has an informative annex on ageing).
"""

from __future__ import annotations

import math

from benchkit.errors import UserError

REFERENCE_AGE_H = 1000.0  # tolerances refer to 1000 h since the last heat [standard: EIA-198-1 1.1.2]
T1_H = 1.0  # start of the logarithmic law, hours after the heat [common practice]

# Typical aging rates in % per decade of hours, by EIA-198 change letter [common practice:
# X7R/X5R about 1-4 with 2.5 a common figure, Y5V about 7, class 1 (C0G) about 0].
TYPICAL_K_PCT = {"F": 2.5, "P": 2.5, "R": 2.5, "S": 2.5, "T": 7.0, "U": 7.0, "V": 7.0}
# The spread of the rate for the stable class-2 codes (X7R/X5R) [common practice: about 1-4].
K_RANGE_PCT_STABLE = (1.0, 4.0)


def aging_fraction(t_h: float, k_pct_per_decade: float, t1_h: float = T1_H) -> float:
    """C(t)/C(t1) = 1 - (k/100)*log10(t/t1)."""
    t, t1, k = float(t_h), float(t1_h), float(k_pct_per_decade)
    if not (t > 0 and t1 > 0 and math.isfinite(t) and math.isfinite(t1)):
        raise UserError(f"aging: ages must be positive hours (t={t_h!r}, t1={t1_h!r})")
    if not (math.isfinite(k) and k >= 0):
        raise UserError(f"aging rate must be a number >= 0 %/decade, got {k_pct_per_decade!r}")
    frac = 1.0 - (k / 100.0) * math.log10(t / t1)
    if frac <= 0:
        raise UserError(f"aging law gives no capacitance left at {t:g} h with k = {k:g} %/decade")
    return frac


def aging_factor(from_h: float, to_h: float, k_pct_per_decade: float, t1_h: float = T1_H) -> float:
    """Multiply a capacitance measured at age from_h by this to refer it to age to_h."""
    return aging_fraction(to_h, k_pct_per_decade, t1_h) / aging_fraction(from_h, k_pct_per_decade, t1_h)


def refer_to_reference_age(C_F: float, age_h: float, k_pct_per_decade: float,
                           t1_h: float = T1_H) -> float:
    """Capacitance at REFERENCE_AGE_H (1000 h) from a reading at age_h."""
    return float(C_F) * aging_factor(age_h, REFERENCE_AGE_H, k_pct_per_decade, t1_h)


def typical_rate_pct(class_code: str | None) -> float:
    """A typical aging rate for a temperature-characteristic code; 0 for class 1."""
    from benchkit.catalogue.codes import parse_class_code

    if not class_code:
        return TYPICAL_K_PCT["R"]
    code = parse_class_code(class_code)
    if code.dielectric_class == 1:
        return 0.0
    return TYPICAL_K_PCT[code.code[2]]


def rate_range_pct(class_code: str | None) -> tuple[float, float]:
    """Plausible (lowest, highest) aging rate for a code, for worst-case and uncertainty work."""
    k = typical_rate_pct(class_code)
    if k == 0.0:
        return (0.0, 0.0)
    if k == TYPICAL_K_PCT["R"]:
        return K_RANGE_PCT_STABLE
    # the high-change codes (Y5V and the like): about 7 %/decade typical [common practice];
    # the spread around it is our assumption, stated in every report that uses it.
    return (0.5 * k, 1.5 * k)
