"""Measurement uncertainty by the GUM (JCGM 100:2008): standard uncertainties of the inputs,
combined in quadrature with their sensitivity coefficients, expanded by a coverage factor.

Why a budget object and not a single number: the report shows every component, so a reader
can see what dominates and argue with it.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from benchkit.errors import UserError

# A typical basic accuracy of a bench LCR meter, read as a rectangular half-width
# [from memory: bench LCR meters quote about 0.05-0.1 % basic accuracy; use your meter's
# figure for its range, frequency and level].
DEFAULT_METER_ACCURACY_PCT = 0.1

DEFAULT_K = 2.0  # coverage factor for about 95 % coverage [standard: JCGM 100:2008, 6.3]


def type_a(values) -> float:
    """Type A standard uncertainty of a mean: s/sqrt(n) [standard: JCGM 100:2008, 4.2.3]."""
    x = np.asarray(values, dtype=float)
    if x.size < 2:
        raise UserError("type A evaluation needs at least 2 repeated observations")
    return float(np.std(x, ddof=1) / math.sqrt(x.size))


def type_a_from_std(s: float, n: int) -> float:
    """s/sqrt(n) when the experimental standard deviation s of n readings is already known."""
    if n < 1:
        raise UserError("type A evaluation needs n >= 1 readings")
    return float(s) / math.sqrt(n)


def rectangular(half_width: float) -> float:
    """Type B standard uncertainty of a rectangular distribution of half-width a: a/sqrt(3)
    [standard: JCGM 100:2008, 4.3.7]."""
    return abs(float(half_width)) / math.sqrt(3.0)


@dataclass(frozen=True)
class Component:
    """One input of the budget: its standard uncertainty u (in the input's unit), the
    sensitivity coefficient c = d(result)/d(input), and how it was evaluated."""

    name: str
    u: float
    sensitivity: float = 1.0
    evaluation: str = "type B"
    note: str = ""

    @property
    def contribution(self) -> float:
        """|c|*u: this input's share of the result's uncertainty, in the result's unit."""
        return abs(self.sensitivity * self.u)


def combined(components, correlation=None) -> float:
    """u_c = sqrt(sum_i sum_j c_i c_j u_i u_j r_ij); with no correlation matrix the inputs are
    taken as independent, u_c^2 = sum c_i^2 u_i^2 [standard: JCGM 100:2008, 5.1.2 and 5.2.2]."""
    comps = list(components)
    if not comps:
        return 0.0
    cu = np.array([c.sensitivity * c.u for c in comps], dtype=float)
    if not np.all(np.isfinite(cu)):
        bad = [c.name for c in comps if not math.isfinite(c.sensitivity * c.u)]
        raise UserError(f"uncertainty component(s) not finite: {', '.join(bad)}")
    if correlation is None:
        return float(math.sqrt(float(np.sum(cu * cu))))
    r = np.asarray(correlation, dtype=float)
    if r.shape != (len(comps), len(comps)):
        raise UserError(f"correlation matrix must be {len(comps)}x{len(comps)}")
    var = float(cu @ r @ cu)
    return math.sqrt(max(var, 0.0))


def expanded(u_c: float, k: float = DEFAULT_K) -> float:
    """Expanded uncertainty U = k*u_c [standard: JCGM 100:2008, 6.2.1]."""
    if not (k > 0 and math.isfinite(k)):
        raise UserError(f"coverage factor k must be a positive number, got {k!r}")
    return float(k) * float(u_c)


@dataclass
class Budget:
    """An uncertainty budget for one result: components, u_c, k and U."""

    components: list[Component] = field(default_factory=list)
    k: float = DEFAULT_K

    @property
    def u_c(self) -> float:
        return combined(self.components)

    @property
    def U(self) -> float:  # noqa: N802 - the GUM's symbol
        return expanded(self.u_c, self.k)

    def to_dict(self) -> dict:
        return {
            "components": [
                {"name": c.name, "u": c.u, "sensitivity": c.sensitivity,
                 "evaluation": c.evaluation, "note": c.note, "contribution": c.contribution}
                for c in self.components
            ],
            "u_c": self.u_c,
            "k": self.k,
            "U": self.U,
        }
