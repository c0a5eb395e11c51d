"""Adaptive bias steps: a coarse loop, then more points where the fitted C(V) is least
certain or bends most, until its uncertainty band is inside the plan's target.

Why passes, and what is physically honest about them. A class-2 part is hysteretic: its
reading depends on where the bias came from (Miller-type branches [published: S. L. Miller et
al., J. Appl. Phys. 68, 6463 (1990)]), so within a branch the bias must move monotonically,
and a point cannot be "inserted" between two measured ones afterwards. So the sweep of a
sample is made of passes, each a full loop at the plan's polarity (benchkit.sweep runs them):

    pass 1 (coarse): 0 V -> top (rising), then back from the top to 0 V at the same biases
        (falling). Its rising steps are planned one at a time, each aiming at a change of C
        of `coarse_step_pct_of_C0` from the slope of the step before, none but the last
        longer than the even step top/(coarse_points - 1) (`coarse_spacing = "stepped"`,
        the default; see LoopPlanner._continue_first), so the knee of a steep part gets its
        points in the first loop and a flat part about the even loop; `coarse_spacing =
        "even"` takes `coarse_points` evenly spaced biases.
    pass k >= 2: back to 0 V (if it has rising points), rise through its new rising points,
        go on without reading up to the same top, fall through its new falling points. At
        each such turning point the engine waits for the part to charge (the dwell policy's
        turn wait, benchkit/sweep/passes.py): a part charged through the fixture's feed
        resistor lags a fast ramp, and one that turns short of the top follows another
        falling branch.

After every pass each branch is fitted (fits.fit_sweep, the plan's model, "auto" by
default; per-point sigma pooled over the branch as an absolute part plus a part
proportional to the reading, see `pooled_sigma`). Its band is U(V) = k*u_C(V) (k =
coverage_k, 2 by default [standard: GUM, JCGM 100:2008, expanded uncertainty]) over the
whole measured range, in percent of C0 (the rising fit at 0 V), widened by a prediction
check: each interior point is predicted by the same family fitted without it, and the miss
counts as band in the gaps beside it (the covariance band assumes the law is right; between
sparse points a wrong law shows up only this way). A branch whose band exceeds
`target_band_pct_of_C0` anywhere gets as many new points as it has gaps (between
neighbouring measured biases) where the band exceeds the target, placed in the gaps ranked by max(band in the gap, chord deviation |C''|*h^2/8 of the
gap), so points go where the fit is least certain or where the curve bends most (in the
middle half of the gap: at the widest band, or in the middle when the bend ranks it). A
branch whose band exceeds the target only where no point can go (below `remanent_V`, or in
a gap already at `resolution_V`) gets no points: points elsewhere cannot narrow it there.
It stops when both bands are inside the target ("target met"), when the plan's point budget
`max_points` (all points of the sample) is used up ("point budget reached"), when no gap
is wide enough for another point at `resolution_V` ("resolution limit"), or when a
refinement pass narrowed the worst band by less than MIN_PASS_GAIN ("no progress": the band
is then held up by the data, not by the spacing, and another loop costs two turning points).

History. Every pass turns at the same top, so all falling points follow one falling
branch. Just after the turn the reading stays nearly flat until the bias has come down by
about twice the coercive voltage, then joins the falling branch with a corner (Miller: the
branches are one curve shifted by +-Ec). The shift s between the coarse branches (least
squares, C_falling(V) ~ C_rising(V + s)) locates the corner at top - s: the falling branch
is fitted below it and gets a point there (when the rising curve changes by more than half
the target over s, i.e. when the corner can matter). A later pass's rising points are not on
the virgin curve from rest: after a loop the part keeps a remanent state and its rising
branch stays near the falling branch's 0 V value until the bias passes about twice the
coercive voltage (and the slower aging-like drop under bias recovers only over hours
[published: T. Tsurumi et al., J. Electroceram. 21, 17 (2008)]). So refinement rising points
are placed only above `remanent_V`, the bias at which the coarse rising fit falls to the
falling fit's 0 V value; below it the virgin curve rests on pass 1 alone. Each pass is
recorded as a `repeat` of the loop in points.csv.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, asdict
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

BRANCHES = ("rising", "falling")
GRID_POINTS = 401  # where the band and the curvature of a fit are looked at
STOP_TARGET = "target met"
STOP_BUDGET = "point budget reached"
STOP_RESOLUTION = "resolution limit: no gap wide enough for another point"
STOP_STALLED = "no progress: the last pass did not narrow the band"
# A refinement pass that narrows the worst band by less than this fraction is not repeated:
# the band is then set by the consistency of the data (noise, relaxation left in the
# readings, a law that does not follow the part), not by the spacing of the points, and one
# more loop (two turning points and their waits) buys nothing.
MIN_PASS_GAIN = 0.1
# Stepped first loop (LoopPlanner._continue_first): a step is at most this many times the one
# before (the slope of the last step cannot see a knee ahead), and at least 1/MIN_STEP_DIVISOR
# of the even loop's step (noise in a flat part's slope must not shrink the steps to nothing).
STEP_GROWTH = 1.5
MIN_STEP_DIVISOR = 8.0
COARSE_SPACINGS = ("stepped", "even")  # the first loop: planned point by point, or even


@dataclass(frozen=True)
class AdaptiveSettings:
    """The plan's [adaptive] table (benchkit.sweep.plan checks it)."""

    target_band_pct_of_C0: float = 0.5
    max_points: int = 40
    coarse_points: int = 7
    coarse_spacing: str = "stepped"  # or "even": coarse_points evenly spaced
    coarse_step_pct_of_C0: float = 15.0  # the change of C a stepped first loop's step aims at
    coverage_k: float = 2.0
    resolution_V: float | None = None  # None: 1/200 of the top bias
    model: str = "auto"

    def __post_init__(self):
        if not (self.target_band_pct_of_C0 > 0 and math.isfinite(self.target_band_pct_of_C0)):
            raise ValueError("adaptive: target_band_pct_of_C0 must be a positive number")
        if self.coarse_points < 3:
            raise ValueError("adaptive: coarse_points must be at least 3 (a C(V) fit needs them)")
        if self.max_points < 2 * self.coarse_points - 1:
            raise ValueError(f"adaptive: max_points ({self.max_points}) is below the coarse loop "
                             f"of 2*coarse_points - 1 = {2 * self.coarse_points - 1} points")
        if not self.coverage_k > 0:
            raise ValueError("adaptive: coverage_k must be positive")
        if self.resolution_V is not None and not self.resolution_V > 0:
            raise ValueError("adaptive: resolution_V must be positive")
        if self.coarse_spacing not in COARSE_SPACINGS:
            raise ValueError("adaptive: coarse_spacing must be one of "
                             + ", ".join(map(repr, COARSE_SPACINGS)))
        c = self.coarse_step_pct_of_C0
        if not (0 < c < 100 and math.isfinite(c)):
            raise ValueError("adaptive: coarse_step_pct_of_C0 must be a percentage between 0 and "
                             "100 (the change of C a step of the first loop aims at)")

    @classmethod
    def from_plan(cls, table: Mapping) -> "AdaptiveSettings":
        return cls(**{k: table[k] for k in cls.__dataclass_fields__ if k in table})


@dataclass(frozen=True)
class MeasuredPoint:
    """One measured point as the planner needs it (signed bias, as set)."""

    branch: str
    bias_V: float
    C_F: float
    sigma_F: float | None = None


@dataclass
class BranchStatus:
    """How far one branch is: its fit, band and where the band is widest."""

    branch: str
    n_points: int
    model: str | None
    band_pct_of_C0: float  # max over the range of k*u_C/C0, percent (inf: no fit yet)
    worst_bias_V: float | None
    fit_error: str | None = None

    def to_dict(self) -> dict:
        d = asdict(self)
        if not math.isfinite(d["band_pct_of_C0"]):
            d["band_pct_of_C0"] = None
        return d


@dataclass
class PassPlan:
    """The next pass of a sample: its points in measuring order (empty when it stops)."""

    index: int
    points: list[tuple[str, float]]
    stop_reason: str | None
    status: dict[str, BranchStatus] = field(default_factory=dict)
    remanent_V: float | None = None
    turn_shift_V: float | None = None
    open: bool = False  # more points of this pass follow, planned from these (first loop)


# --------------------------------------------------------------------------- fitting


def measured_point(row: Mapping[str, Any]):
    """A points.csv row (text or values) as a MeasuredPoint."""
    def num(v):
        return None if v is None or v == "" else float(v)

    C, s, n = num(row["C_F"]), num(row["C_std_F"]), num(row["n_readings"])
    sigma = s / math.sqrt(n) if s is not None and n and s > 0 else None
    return MeasuredPoint(row["branch"], float(row["bias_set_V"]), C, sigma)


def branch_data(points: Iterable[MeasuredPoint], branch: str, above_V: float | None = None):
    """(bias_V, C_F, sigma_F) of one branch, ordered by |bias|, for a fit.

    above_V: leave out points with |bias| above it (the flat turn transition of the falling
    branch, see the module docstring). sigma: pooled_sigma of the points' sigma_F (three
    readings per point give too unsteady single values to weight a fit by); None when the
    points carry no sigma.
    """
    tol = 1e-9
    pts = [p for p in points if p.branch == branch and p.C_F is not None and p.C_F > 0
           and (above_V is None or abs(p.bias_V) <= above_V + tol)]
    pts.sort(key=lambda p: abs(p.bias_V))
    V = np.array([p.bias_V for p in pts], dtype=float)
    C = np.array([p.C_F for p in pts], dtype=float)
    s = np.array([p.sigma_F if p.sigma_F is not None and p.sigma_F > 0 else np.nan for p in pts])
    sigma = pooled_sigma(C, s) if pts and np.all(np.isfinite(s)) else None
    return V, C, sigma


def pooled_sigma(C_F, sigma_F) -> np.ndarray:
    """Each point's sigma from all of them: sigma^2 = a^2 + (b*C)^2, a part in absolute terms
    and a part proportional to the reading, a and b from every point's own sigma.

    Why both: an LCR meter's accuracy is a percentage of the reading plus a floor [common
    practice: the "% of reading + % of range" form of instrument specifications], and a
    point read off a relaxation fit (settle detection by prediction) is known to a fixed
    fraction of C0 whatever its bias (benchkit/sweep/settle.py): pooling either part alone
    mis-weights a curve that falls to a tenth of C0, e.g. a pooled relative scatter over such
    points gives the 0 V point several times its own uncertainty. The fit is least squares
    on sigma_i^2 with a^2, b^2 >= 0 (scipy.optimize.nnls), each row divided by sigma_i^2 so
    that small and large sigmas count alike."""
    from scipy.optimize import nnls

    C = np.asarray(C_F, dtype=float)
    s2 = np.square(np.asarray(sigma_F, dtype=float))
    A = np.column_stack([np.ones_like(C), C * C]) / s2[:, None]
    (a2, b2), _ = nnls(A, np.ones_like(C))
    if not a2 + b2 > 0:  # no solution worth the name: the relative scatter pooled alone
        return math.sqrt(float(np.mean(s2 / (C * C)))) * C
    return np.sqrt(a2 + b2 * C * C)


def fit_branch(points: Iterable[MeasuredPoint], branch: str, model: str = "auto",
               above_V: float | None = None, **labels):
    """fits.fit_sweep on one branch (see branch_data); FitError when it cannot be fitted."""
    from fits import fit_sweep

    V, C, sigma = branch_data(list(points), branch, above_V)
    return fit_sweep(V, C, sigma, model=model, branch=branch, **labels)


def fit_sweep_quiet(V, C, sigma, model, branch):
    """fits.fit_sweep with the plan's labels left out (for the planner's own checks)."""
    from fits import fit_sweep

    return fit_sweep(V, C, sigma, model=model, branch=branch)


def band_pct_of_C0(curve, C0_F: float, k: float, grid_V) -> np.ndarray:
    """k*u_C(V)/C0 in percent on the grid (the grid must be inside the curve's range)."""
    return 100.0 * k * np.asarray(curve.u_C(grid_V), dtype=float) / C0_F


def curvature_per_V2(curve, grid_V) -> np.ndarray:
    """|d2C/dV2| of the fitted curve on the grid (finite differences of curve.C)."""
    C = np.asarray(curve.C(grid_V), dtype=float)
    return np.abs(np.gradient(np.gradient(C, grid_V), grid_V))


# --------------------------------------------------------------------------- planning


def _clean(v: float) -> float:
    return float(f"{v:.10g}")


class LoopPlanner:
    """Plans the passes of one sample (see the module docstring); deterministic, so a run
    can be replayed from its points."""

    def __init__(self, top_V: float, settings: AdaptiveSettings,
                 branches: Sequence[str] = BRANCHES):
        if not top_V or not math.isfinite(top_V):
            raise ValueError("adaptive: the top bias must be a nonzero number of volts")
        if tuple(branches)[:1] != ("rising",):
            raise ValueError("adaptive: branches must be ['rising'] or ['rising', 'falling']")
        self.top_V = float(top_V)
        self.sign = 1.0 if top_V > 0 else -1.0
        self.top_mag = abs(self.top_V)
        self.s = settings
        self.branches = tuple(branches)
        self.resolution_V = settings.resolution_V or self.top_mag / 200.0
        self.grid_mag = np.linspace(0.0, self.top_mag, GRID_POINTS)
        self.remanent_V: float | None = None
        self.turn_shift_V: float | None = None
        self.history: list[PassPlan] = []

    # -- pass 1 ----------------------------------------------------------------
    def first_pass(self) -> PassPlan:
        """The start of the first loop: all of it (the even loop), or with stepped coarse
        points its 0 V point, the rest planned point by point (next_pass, _continue_first)."""
        if self.s.coarse_spacing == "even":
            plan = PassPlan(1, self.even_loop(), None)
        else:
            plan = PassPlan(1, [("rising", 0.0)], None, open=True)
        self.history = [plan]
        return plan

    def even_loop(self) -> list[tuple[str, float]]:
        """coarse_points evenly spaced from 0 V to the top, and back down at the same biases.
        With stepped coarse points it is the first loop's fewest points: its first step is
        half the even one and only its last may be longer, by at most half."""
        mags = [_clean(self.top_mag * i / (self.s.coarse_points - 1))
                for i in range(self.s.coarse_points)]
        pts = [("rising", self._signed(m)) for m in mags]
        if "falling" in self.branches:
            pts += [("falling", self._signed(m)) for m in reversed(mags[:-1])]
        return pts

    @property
    def max_coarse_step_V(self) -> float:
        return self.top_mag / (self.s.coarse_points - 1)

    @property
    def min_coarse_step_V(self) -> float:
        return max(2 * self.resolution_V, self.max_coarse_step_V / MIN_STEP_DIVISOR)

    def _continue_first(self, points: Sequence[MeasuredPoint]) -> list[tuple[str, float]]:
        """The next points of the first loop: one rising point until the top is reached, then
        the whole falling branch; [] when the loop is complete.

        Rising: each step aims at a change of C of coarse_step_pct_of_C0 (percent of C0, the
        0 V reading), from the slope of the last step: h = target/|dC/dV|, at most
        STEP_GROWTH times the last step and the even loop's step (top/(coarse_points - 1)),
        at least min_coarse_step_V; a step that would leave less than half a step to the
        top goes to the top (so the last step is at most 1.5 times the even one: a sliver
        of a step is one more point on each branch where the curve is flattest). A class-2
        curve falls steeply over a few characteristic voltages and flattens above; evenly
        spaced points waste most of the loop on the flat tail and leave the knee to later
        loops, each of which costs two turning points. The
        bias only rises on this branch (module docstring), so a step can only follow from the
        points before it, as in an integrator's step-size control [published: E. Hairer, S.
        P. Norsett, G. Wanner, Solving Ordinary Differential Equations I, section II.4, step
        size control; from memory].
        Falling: at the rising branch's biases below the top, downwards, so the branch gets
        the spacing the rising one showed it needs (the branches are one curve shifted by
        about twice the coercive voltage, Miller) and both branches are read at the same
        biases (their difference is the hysteresis at each bias [common practice])."""
        rising = [p for p in points if p.branch == "rising"]
        last = max(abs(p.bias_V) for p in rising)
        if last < self.top_mag - 1e-9:
            return [("rising", self._signed(self._next_rising_mag(rising, last)))]
        if "falling" in self.branches and not any(p.branch == "falling" for p in points):
            mags = sorted({_clean(abs(p.bias_V)) for p in rising if abs(p.bias_V) < self.top_mag - 1e-9},
                          reverse=True)
            return [("falling", self._signed(m)) for m in mags]
        return []

    def _next_rising_mag(self, rising: Sequence[MeasuredPoint], last: float) -> float:
        h_max, h_min = self.max_coarse_step_V, self.min_coarse_step_V
        read = sorted(((abs(p.bias_V), p.C_F) for p in rising if p.C_F is not None and p.C_F > 0))
        if len(read) < 2:
            h = 0.5 * h_max  # no slope yet: half a step, as a step-size control starts
        else:
            (v1, c1), (v2, c2) = read[-2], read[-1]
            h_last = v2 - v1
            slope = abs(c2 - c1) / h_last / read[0][1]  # fraction of C0 per volt
            target = self.s.coarse_step_pct_of_C0 / 100.0
            h = target / slope if slope > 0 else math.inf
            h = max(min(h, STEP_GROWTH * h_last, h_max), h_min)
        nxt = last + h
        if self.top_mag - nxt < 0.5 * h:  # no sliver of a last step: it goes to the top
            return self.top_mag
        nxt = round(nxt / self.resolution_V) * self.resolution_V
        return _clean(min(max(nxt, last + self.resolution_V), self.top_mag))

    @property
    def least_points_ahead(self) -> int:
        """Points an open first loop will still plan, at least, beyond those planned so far
        (a progress line's total would otherwise read 100 % at every point of it): rising
        steps of at most the even step (the last at most 1.5 of it) up to the top, then the
        falling branch at the rising biases below the top."""
        planned = [(b, abs(v)) for h in self.history if h.index == 1 for b, v in h.points]
        if not (self.history and self.history[-1].open) or not planned:
            return 0
        rising = [m for b, m in planned if b == "rising"]
        left, h = self.top_mag - max(rising), self.max_coarse_step_V
        more = 0 if left <= 1e-9 else 1 + max(0, math.ceil((left - 1.5 * h) / h - 1e-9))
        return more + ((len(rising) + more - 1) if "falling" in self.branches else 0)

    @property
    def passes_measured(self) -> int:
        """Loops with points measured (a first loop planned point by point counts once)."""
        return len({p.index for p in self.history if p.points})

    # -- later passes ------------------------------------------------------------
    def next_pass(self, points: Sequence[MeasuredPoint]) -> PassPlan:
        """The pass after the points measured so far (all points of this sample), or the next
        points of a first loop planned point by point (the same pass index, open)."""
        points = list(points)
        last = self.history[-1] if self.history else None
        if last is not None and last.open:
            more = self._continue_first(points)
            if more:
                rising_on = more[0][0] == "rising"  # the falling branch ends the loop
                return self._record(PassPlan(last.index, more, None, open=rising_on))
            last.open = False
        index = (last.index if last is not None else 0) + 1
        fits = {b: self._fit(points, b) for b in self.branches}
        C0 = self._C0(fits, points)
        if index == 2:  # what the coarse loop says about the part's history (docstring)
            self.remanent_V = self._remanent_V(fits)
            self.turn_shift_V = self._turn_shift_V(fits, C0)
            if self.falling_top_V is not None and "falling" in fits:
                fits["falling"] = self._fit(points, "falling")
        status: dict[str, BranchStatus] = {}
        gaps: dict[str, list[tuple[float, float]]] = {}
        for b in self.branches:
            status[b], gaps[b] = self._assess(b, fits[b], points, C0)
        failing = [b for b in self.branches if not status[b].band_pct_of_C0 <= self.s.target_band_pct_of_C0]
        corner = self._turn_corner(points)
        if not failing and corner is None:
            return self._record(PassPlan(index, [], STOP_TARGET, status, self.remanent_V))
        room = self.s.max_points - len(points)
        if room <= 0:
            return self._record(PassPlan(index, [], STOP_BUDGET, status, self.remanent_V))
        if index >= 3 and corner is None and self._stalled(status, failing):
            return self._record(PassPlan(index, [], STOP_STALLED, status, self.remanent_V))
        chosen: list[tuple[float, str, float]] = []  # (priority, branch, magnitude)
        for b in failing:
            cands = gaps[b]
            # one new point per gap whose band exceeds the target; none when the excess lies
            # only where no point can go (below remanent_V, or a gap at the resolution)
            n_uncertain = sum(1 for c in cands if c[2] > self.s.target_band_pct_of_C0)
            ranked = sorted(cands, key=lambda c: -c[0])[:n_uncertain]
            chosen += [(pri, b, mag) for pri, mag, _ in ranked]
        if corner is not None:
            chosen.append((math.inf, "falling", corner))
        if not chosen:
            return self._record(PassPlan(index, [], STOP_RESOLUTION, status, self.remanent_V))
        chosen.sort(key=lambda c: -c[0])
        chosen = chosen[:room]
        rising = sorted(m for _, b, m in chosen if b == "rising")
        falling = sorted((m for _, b, m in chosen if b == "falling"), reverse=True)
        pts = [("rising", self._signed(m)) for m in rising]
        pts += [("falling", self._signed(m)) for m in falling]
        return self._record(PassPlan(index, pts, None, status, self.remanent_V))

    def _stalled(self, status, failing) -> bool:
        """The worst failing band is not MIN_PASS_GAIN narrower than after the pass before,
        among the branches that failed then too: a branch the last pass's points showed to be
        less certain than its earlier fit claimed is new work, not a stall."""
        prev = self.history[-1].status if self.history else {}
        target = self.s.target_band_pct_of_C0
        again = [b for b in failing if b in prev and not prev[b].band_pct_of_C0 <= target]
        if not again:
            return False
        now = max(status[b].band_pct_of_C0 for b in again)
        before = max(prev[b].band_pct_of_C0 for b in again)
        return math.isfinite(before) and now > (1.0 - MIN_PASS_GAIN) * before

    @property
    def falling_top_V(self) -> float | None:
        """|bias| where the falling branch proper begins below the top (the end of the flat
        turn transition), or None when there is no transition worth the name."""
        s = self.turn_shift_V
        if "falling" not in self.branches or s is None or s < 2 * self.resolution_V:
            return None
        return self._corner_mag(s)

    def _corner_mag(self, shift: float) -> float:
        mag = round((self.top_mag - shift) / self.resolution_V) * self.resolution_V
        return _clean(min(max(mag, self.resolution_V), self.top_mag - self.resolution_V))

    @property
    def stopped(self) -> bool:
        """True once a pass came back empty (with its stop reason)."""
        return bool(self.history) and not self.history[-1].points

    def _record(self, plan: PassPlan) -> PassPlan:
        plan.turn_shift_V = self.turn_shift_V
        self.history.append(plan)
        return plan

    def _signed(self, mag: float) -> float:
        return 0.0 if mag == 0 else _clean(self.sign * mag)

    def _fit(self, points, branch):
        from fits import FitError

        try:
            above = self.falling_top_V if branch == "falling" else None
            return fit_branch(points, branch, self.s.model, above)
        except FitError as exc:
            return exc

    def _C0(self, fits, points) -> float:
        f = fits.get("rising")
        if f is not None and not isinstance(f, Exception):
            lo, hi = f.curve.valid_range_V
            if lo <= 0.0 <= hi:
                return float(f.curve.C(0.0))
        at0 = [p.C_F for p in points if p.branch == "rising" and p.bias_V == 0 and p.C_F]
        if at0:
            return float(at0[0])
        return float(max(p.C_F for p in points if p.C_F))

    def _assess(self, branch, fit, points, C0):
        """(status, candidate gaps [(priority, new magnitude, band in gap)])."""
        V, _, _ = branch_data(points, branch, self.falling_top_V if branch == "falling" else None)
        mags = np.unique(np.abs(V))
        if isinstance(fit, Exception) or fit is None:
            band = np.full(self.grid_mag.shape, np.inf)
            bend = np.zeros(self.grid_mag.shape)
            st = BranchStatus(branch, int(V.size), None, math.inf, None, str(fit))
        else:
            curve = fit.curve
            lo, hi = (abs(x) for x in curve.valid_range_V)
            lo, hi = min(lo, hi), max(lo, hi)
            # clipped: a grid point a rounding error beyond the curve's range has no band
            grid = np.clip(self.grid_mag[(self.grid_mag >= lo - 1e-12) & (self.grid_mag <= hi + 1e-12)],
                           lo, hi)
            signed = self.sign * grid
            band_in = band_pct_of_C0(curve, C0, self.s.coverage_k, signed)
            bend_in = 100.0 * curvature_per_V2(curve, signed) / C0 if grid.size >= 5 else np.zeros(grid.size)
            band = np.interp(self.grid_mag, grid, band_in)
            bend = np.interp(self.grid_mag, grid, bend_in)
            i = int(np.argmax(band_in))
            st = BranchStatus(branch, int(V.size), curve.model, float(band_in.max()),
                              float(signed[i]))
        floor = 0.0
        if branch == "rising" and self.remanent_V is not None:
            floor = abs(self.remanent_V)
        loo = self._loo_pct(branch, fit, points, C0, mags)
        if loo:
            st.band_pct_of_C0 = max(st.band_pct_of_C0, max(loo.values()))
        cands = []
        for a, b in zip(mags[:-1], mags[1:]):
            lo_m, hi_m = max(a, floor), b
            if hi_m - lo_m < 2 * self.resolution_V:
                continue
            sel = (self.grid_mag >= a) & (self.grid_mag <= b)
            u_gap = max([float(band[sel].max()) if sel.any() else math.inf,
                         loo.get(float(a), 0.0), loo.get(float(b), 0.0)])
            chord = float(bend[sel].max()) * (b - a) ** 2 / 8.0 if sel.any() else 0.0
            # the middle half of the gap: a new point right beside a measured one adds little
            q = 0.25 * (hi_m - lo_m)
            inner = sel & (self.grid_mag >= lo_m + q) & (self.grid_mag <= hi_m - q)
            if u_gap >= chord and inner.any() and math.isfinite(u_gap):
                idx = np.flatnonzero(inner)
                mag = float(self.grid_mag[idx[np.argmax(band[idx])]])
            else:
                mag = 0.5 * (lo_m + hi_m)
            mag = round(mag / self.resolution_V) * self.resolution_V
            mag = min(max(mag, lo_m + self.resolution_V), hi_m - self.resolution_V)
            cands.append((max(u_gap, chord), _clean(mag), u_gap))
        return st, cands

    def _loo_pct(self, branch, fit, points, C0, mags) -> dict[float, float]:
        """Prediction check: {|bias| of each interior point: |C - C predicted without it|/C0 in
        percent}, the same model family refitted without that point. The covariance band
        assumes the model is right; this shows where it is not (a wrong law between sparse
        points). Bridging twice the gap, it errs on the cautious side."""
        from fits import FitError

        if isinstance(fit, Exception) or fit is None:
            return {}
        V, C, sigma = branch_data(points, branch, self.falling_top_V if branch == "falling" else None)
        out: dict[float, float] = {}
        order = np.argsort(np.abs(V))
        for j in order[1:-1]:
            keep = np.arange(V.size) != j
            pred = math.nan
            # the chosen family first; if it cannot be refitted without the point, any family
            for model in (fit.curve.model, self.s.model):
                try:
                    f = fit_sweep_quiet(V[keep], C[keep], None if sigma is None else sigma[keep],
                                        model, branch)
                    pred = float(f.curve.C(V[j]))
                    break
                except (FitError, ValueError):
                    continue
            out[float(abs(V[j]))] = 100.0 * abs(C[j] - pred) / C0 if math.isfinite(pred) else math.inf
        return out

    def _turn_corner(self, points) -> float | None:
        """|bias| of the point the falling branch still needs just after the turn, or None.

        After the turn at the top the reading stays nearly flat until the bias has come down
        by about twice the coercive voltage, then joins the falling branch with a corner (the
        Miller branches are the anhysteretic curve shifted by +-Ec [published: S. L. Miller et
        al., J. Appl. Phys. 68, 6463 (1990)]). No smooth law fits through that corner, so the
        falling branch is fitted below it only (falling_top_V), and it needs a point there to
        reach up to it. None when it has one already, or when there is no transition."""
        corner = self.falling_top_V
        if corner is None:
            return None
        tol = max(0.25 * self.turn_shift_V, self.resolution_V)
        if any(abs(abs(p.bias_V) - corner) <= tol for p in points if p.branch == "falling"):
            return None
        return corner

    def _turn_shift_V(self, fits, C0: float) -> float:
        """Shift s with C_falling(V) ~ C_rising(V + s), least squares on the two coarse fits
        (Miller: s = 2*Ec*layer thickness). 0 when either fit is missing, or when the corner
        cannot matter: the rising curve changes by less than half the target over s below
        the top (a flat curve, e.g. class 1, has no corner to miss)."""
        r, f = fits.get("rising"), fits.get("falling")
        if r is None or f is None or isinstance(r, Exception) or isinstance(f, Exception):
            return 0.0
        s = self._best_shift(r, f)
        try:
            step = abs(float(r.curve.C(self.top_V)) - float(r.curve.C(self.sign * (self.top_mag - s))))
        except Exception:
            return 0.0
        return s if 100.0 * step / C0 > 0.5 * self.s.target_band_pct_of_C0 else 0.0

    def _best_shift(self, r, f) -> float:
        """Least-squares shift over the falling fit's range (where the rising one reaches)."""
        trials = np.linspace(0.0, 0.5 * self.top_mag, 201)
        lo, hi = sorted(abs(x) for x in f.curve.valid_range_V)
        g = self.grid_mag[(self.grid_mag >= lo) & (self.grid_mag <= hi)]
        best, best_ssr = 0.0, math.inf
        for s in trials:
            sel = g + s <= self.top_mag
            if sel.sum() < 10:
                break
            try:
                cf = np.asarray(f.curve.C(self.sign * g[sel]), dtype=float)
                cr = np.asarray(r.curve.C(self.sign * (g[sel] + s)), dtype=float)
            except Exception:
                continue
            ssr = float(np.mean((cf - cr) ** 2))
            if ssr < best_ssr:
                best, best_ssr = float(s), ssr
        return best

    def _remanent_V(self, fits) -> float:
        """Bias where the first pass's rising fit falls to the falling fit's 0 V value: below
        it a later rising pass is not on the virgin curve (see the module docstring)."""
        r, f = fits.get("rising"), fits.get("falling")
        if r is None or f is None or isinstance(r, Exception) or isinstance(f, Exception):
            return 0.0
        try:
            c_rem = float(f.curve.C(0.0))
            grid = self.sign * self.grid_mag
            c = np.asarray(r.curve.C(grid), dtype=float)
        except Exception:  # a range that does not reach 0 V: nothing to say
            return 0.0
        below = np.flatnonzero(c <= c_rem)
        return float(grid[below[0]]) if below.size else 0.0


__all__ = ["AdaptiveSettings", "LoopPlanner", "MeasuredPoint", "BranchStatus", "PassPlan",
           "branch_data", "pooled_sigma", "fit_branch", "band_pct_of_C0", "curvature_per_V2",
           "STOP_TARGET", "STOP_BUDGET", "STOP_RESOLUTION", "STOP_STALLED", "MIN_PASS_GAIN",
           "COARSE_SPACINGS"]
