"""How far a judged point sits from its tolerance limits, said in plain words.

Why one module: the terminal (`benchkit verify`) and the report say the same thing about the
same point, so the arithmetic and the wording live once. Everything is in percent of the
claimed value at that bias, the figure an engineer compares with the tolerance.
"""

from __future__ import annotations

from dataclasses import dataclass

from benchkit.units import format_value


@dataclass(frozen=True)
class Margin:
    """One decided point: its deviation, what the tolerance allows and the distance left."""

    bias_V: float
    measured_F: float
    claimed_F: float
    deviation_pct: float  # measured against the claim, signed
    allowed_below_pct: float  # the tolerance band below and above the claimed value
    allowed_above_pct: float
    margin_pct: float  # to the nearer tolerance limit; negative when outside the band
    limit: str  # "lower" or "upper": the nearer limit
    limit_F: float
    U_pct: float  # expanded uncertainty
    k: float

    def to_dict(self) -> dict:
        return dict(self.__dict__)

    def text(self, micro: str = "u") -> str:
        """e.g. 'at 25 V measured 404.5 nF, 1.1 % above the claimed 400 nF; the tolerance
        allows 15 % either way; 13.9 % of the claim inside the tolerance limit (upper limit
        460 nF); U = 0.47 % (k = 2)'."""
        c = format_value(self.claimed_F, "F", micro=micro)
        m = format_value(self.measured_F, "F", micro=micro)
        d = abs(self.deviation_pct)
        dev = (f"{_pct(d)} {'below' if self.deviation_pct < 0 else 'above'} the claimed {c}"
               if d >= 0.05 else f"equal to the claimed {c} within 0.05 %")
        lo, hi = self.allowed_below_pct, self.allowed_above_pct
        allows = (f"{_pct(lo)} either way" if abs(lo - hi) < 1e-9
                  else f"{_pct(lo)} below and {_pct(hi)} above")
        where = "inside" if self.margin_pct >= 0 else "outside"
        left = (f"{_pct(abs(self.margin_pct))} of the claim {where} the tolerance limit "
                f"({self.limit} limit {format_value(self.limit_F, 'F', micro=micro)})")
        return (f"at {self.bias_V:g} V measured {m}, {dev}; the tolerance allows {allows}; "
                f"{left}; U = {self.U_pct:.2g} % (k = {self.k:g})")


def _pct(x: float) -> str:
    """0.1 % resolution, no trailing zero: 15 %, 13.9 %, 1.1 %."""
    return f"{round(x, 1):g} %"


def margin(p) -> Margin | None:
    """The margin of a PointResult (None when the point was not measured)."""
    if p.measured_F is None or p.budget is None:
        return None
    d, c, m = p.decision, p.claimed_F, p.measured_F
    to_lo, to_hi = m - d.tol_lo, d.tol_hi - m
    limit, left, at = ("lower", to_lo, d.tol_lo) if to_lo < to_hi else ("upper", to_hi, d.tol_hi)
    return Margin(p.bias_V, m, c, 100.0 * (m / c - 1.0), 100.0 * (c - d.tol_lo) / c,
                  100.0 * (d.tol_hi - c) / c, 100.0 * left / c, limit, at, 100.0 * d.U / c,
                  p.budget.k)


def worst(points) -> Margin | None:
    """The decided point with the least margin (the most outside, if any is outside)."""
    ms = [m for m in map(margin, points) if m is not None]
    return min(ms, key=lambda m: m.margin_pct) if ms else None
