"""Settle detection: after a bias step, keep reading until the drift has died down.

Why: after a bias step a class-2 part's reading keeps moving for seconds to minutes
(dielectric absorption and relaxation, X7R about 2-2.5 %) [common practice; fast reversible
drop then a slower one: T. Tsurumi et al., J. Electroceram. 21, 17 (2008)]. A fixed dwell is
either too short for a slow part (the point is read while still drifting) or wastes bench
time on a fast one. This policy watches the part and goes on once it has settled, and says
so in the points file (settle_s, drift_pct_per_s, and the flag "max_dwell" when it gave up).

Estimator (stated, as the plan's threshold depends on it). Readings are taken back to back
(or `read_interval_s` apart). The drift is the ordinary least-squares slope of C against
time over a sliding window of the last `window_s` seconds of readings, divided by the
window's mean C, in percent per second; its standard error comes from the residual scatter
of that fit (scipy.stats.linregress). Averaging over the window is what makes it robust to
meter noise: with N readings spread evenly over W seconds and a relative scatter s of one
reading the standard error is about s*sqrt(12/N)/W. Readings that are not finite or not
positive (an overload answer, a dropped reading) are left out.

Rule. The part counts as settled at the first reading where
  - at least the charge wait has passed since the bias was reached (`min_dwell_s`, or
    `charge_time_constants` times feed_R_ohm*C when the plan gives the fixture's
    `feed_R_ohm` and that is longer: charge_wait_for; see "Charge wait" below),
  - the readings span at least `window_s` (at least MIN_WINDOW_READINGS of them), and
  - |drift| + DRIFT_MARGIN_SE * u(drift) <= max_drift_pct_per_s,
so a window that only looks flat because of noise does not count. If that has not happened
by `max_dwell_s`, it stops there and the point carries the flag "max_dwell" (the reading is
taken anyway; whoever fits it can see it was not shown to be settled). The window's slope is
the mean drift over the window, so it lags the drift at the end of the window (for an
exponential approach by exp(window_s/(2*tau))): the rule errs on the patient side.

Residual rule (`max_residual_pct_of_reading`). A drift threshold is a poor stand-in for the
accuracy a plan wants: for an exponential approach the error still left when the drift is r
is about r*tau [derived: C = C_inf + A*exp(-t/tau) gives C - C_inf = -tau*dC/dt], so one
threshold is too strict for a fast dielectric and too lax for a slow one. This rule fits
C(t) = C_inf + A*exp(-(t - t_last)/tau) to the readings of the dwell itself (those from
`min_dwell_s` on, when the part has charged through the fixture) and bounds the residual
|A| = |C(t_last) - C_inf| (the distance of the latest reading from where it is going):
for each tau on a log grid from RESIDUAL_TAU_MIN_FRAC of the readings' span up to
`max_tau_s` the model is linear in (C_inf, A), so it is an ordinary least-squares fit; the
taus the data do not exclude (sum of squares within RESIDUAL_PROFILE_DSSR variances of one
reading of the best, a profile-likelihood interval of about three standard errors; the
variance is the larger of the fit's and the successive-difference estimate) are all kept,
and the bound is the largest |A| + RESIDUAL_MARGIN_SE*u(A) among them, in percent of C_inf. A flat
window of noise gives a small bound; a linear drift that the window cannot tell from a slow
exponential gives slope*max_tau_s (the patient side). The part counts as settled when that
bound is within the threshold (and, if the plan also gives max_drift_pct_per_s, the drift
rule holds too). The recorded reading is still the mean of the meter readings taken after
the dwell: the fit only decides when to stop, it never replaces a measurement.

`max_residual_pct_of_C0` is the same bound in percent of the sample's C0 instead of the
reading: the first settled reading of the sample (its 0 V point in an adaptive plan, which
starts at 0 V; the engine calls start_sample() before each sample). A C(V) target is usually
set in percent of C0, and under bias the reading may be a tenth of C0: there a bound in
percent of the reading asks ten times more than the target needs. Until the first point has
settled the reading itself stands in for C0.

Prediction rule (`max_prediction_u_pct_of_C0`). Instead of waiting for the relaxation to
die away, read its end off the fit (benchkit/sweep/prediction.py): the readings from
`min_dwell_s` on are fitted with C_inf + A*exp(-t/tau), tau shared with the sample's earlier
transients (a property of the dielectric), and the part counts as settled as soon as the
standard uncertainty of the predicted C_inf is within the threshold, in percent of C0 (the
sample's first prediction). The point then records the prediction, not a mean of readings:
C_F = C_inf, with its uncertainty in C_std_F (see benchkit/sweep/point.py). A point costs
min_dwell_s plus the few readings the fit needs, about one relaxation time or less once the
sample's first steps have shown its tau. Each finished transient joins the sample's tau
profile; start_sample() clears it. At a turning point of an adaptive loop, where nothing is
recorded, turn_wait() waits the charge wait only: the relaxation still under way
there decays with the same time constant as the next step's own [common practice: linear
response, the responses to successive steps add], so the next point's fit reads it off.

Charge wait. The part charges through the feed resistor with the time constant
feed_R_ohm*C at the bias it is charging to [handbook: first-order RC circuit], and under DC
bias a class-2 part has a fraction of its 0 V capacitance: waiting for the largest C its
tolerance allows at every point wastes most of the wait at high bias. So the wait of each
point (and turn) is sized from the part's own readings there: the first reading, taken as
the ramp ends, and every later one raise it to charge_time_constants*feed_R_ohm*C*
CHARGE_C_MARGIN for the largest C read so far in this dwell, never below `min_dwell_s` and
never beyond the wait for the largest C of the part's tolerance (start_sample); readings
taken before the wait has passed are not used. The margin covers a reading taken while
the part still lags the supply (see CHARGE_C_MARGIN); the readings after it show the C
the part really has there, and lengthen the wait if it is larger.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy import stats

from benchkit.sweep.prediction import MIN_PREDICT_READINGS, Prediction, TauProfile

MIN_WINDOW_READINGS = 5
DRIFT_MARGIN_SE = 1.0  # standard errors of the drift estimate added before comparing
MAX_DWELL_FLAG = "max_dwell"
# A probe that took no clock time (a virtual clock with no simulated meter behind it) would
# never reach the window or the maximum dwell: then the policy sleeps this long between reads.
IDLE_READ_INTERVAL_S = 0.1
MIN_FIT_READINGS = 8  # the residual fit has 3 parameters; a few more to see the noise
RESIDUAL_MARGIN_SE = 2.0  # standard errors of the fitted residual added before comparing
RESIDUAL_PROFILE_DSSR = 9.0  # taus kept: SSR <= SSR_min + this * variance (~3 sigma: the
# rule is checked at every reading, so a 2-sigma interval would be fooled now and then)
RESIDUAL_TAU_MIN_FRAC = 0.05  # shortest tau tried, as a fraction of the readings' span
RESIDUAL_TAU_GRID = 40
MIN_TAU_FRACTION_OF_MIN_DWELL = 0.25  # the prediction's shortest tau (prediction.py)
# Charge wait, in time constants R_feed*C of the part charging through the fixture's feed
# resistor. At the end of a ramp at rate r the part lags the supply by about r*R*C [derived:
# first-order RC low-pass driven by a ramp], and that lag decays as exp(-t/(R*C)): a reading
# taken while it lasts is off by |dC/dV|*lag, which a relaxation fit would take for a fast
# relaxation. With r = 5 V/s, R*C = 0.26 s (22 uF + 20 % on 10 kohm) and |dC/dV| of 15 % of
# C per volt (a steep class-2 curve) the lag costs 20 % of C at first; 8 time constants
# bring it to 0.007 %, below a reading's noise (exp(-8) = 3.4e-4).
CHARGE_TIME_CONSTANTS = 8.0
# The C a charge wait is sized for, as a multiple of the largest reading of the dwell so far.
# A reading taken while the part lags the supply by r*R*C is off by |dC/dV|*lag: with the
# numbers above and a falling step (the part still above its set bias, so C reads low) 15 %
# of C per volt at a lag of up to 1.3 V (22 uF + 20 % at 5 V/s) reads up to 20 % low
# [derived]; 1.25 covers it, and the later readings of the dwell, nearer the charged value,
# lengthen the wait if they show more.
CHARGE_C_MARGIN = 1.25


def largest_C_F(part) -> float | None:
    """The largest C a part may have at 0 V: the top of its tolerance (None if unknown)."""
    limits = getattr(part, "tolerance_limits_F", None)
    try:
        return float(limits()[1]) if callable(limits) else None
    except (TypeError, ValueError):
        return None


def charge_wait_for(min_dwell_s: float, feed_R_ohm: float | None, C_max_F: float | None,
                    n_tau: float = CHARGE_TIME_CONSTANTS, max_dwell_s: float = math.inf) -> float:
    """How long after the bias is reached before a reading can be used: min_dwell_s, or
    n_tau*feed_R_ohm*C_max_F when that is longer (a large part on a high feed resistor
    charges for longer than any one fixed wait suits), never beyond max_dwell_s."""
    wait = float(min_dwell_s)
    if feed_R_ohm is not None and C_max_F is not None and C_max_F > 0:
        wait = max(wait, n_tau * float(feed_R_ohm) * float(C_max_F))
    return min(wait, float(max_dwell_s))


@dataclass(frozen=True)
class DriftEstimate:
    """Drift over one window: percent of the mean reading per second, and its standard error."""

    drift_pct_per_s: float
    u_drift_pct_per_s: float
    n_readings: int
    span_s: float
    mean_C_F: float


def window_drift(t_s, C_F) -> DriftEstimate:
    """Least-squares slope of C(t) over the given readings, in percent of mean C per second.

    Needs at least 3 readings at 2 or more distinct times (the standard error needs a
    residual degree of freedom). ValueError otherwise.
    """
    t = np.asarray(t_s, dtype=float)
    c = np.asarray(C_F, dtype=float)
    if t.size != c.size or t.size < 3 or np.ptp(t) <= 0:
        raise ValueError("a drift estimate needs 3 or more readings spread over time")
    fit = stats.linregress(t - t[0], c)
    mean = float(np.mean(c))
    scale = 100.0 / mean
    return DriftEstimate(float(fit.slope) * scale, float(fit.stderr) * scale, int(t.size),
                         float(np.ptp(t)), mean)


@dataclass(frozen=True)
class ResidualEstimate:
    """Bound on how far the latest reading still is from where the reading is going."""

    residual_pct: float  # bound: |A| + margin*u(A), percent of C_inf, over the kept taus
    tau_s: float  # best-fitting time constant
    tau_hi_s: float  # longest tau the readings do not exclude
    n_readings: int
    span_s: float


def relaxation_residual(t_s, C_F, max_tau_s: float) -> ResidualEstimate:
    """Fit C = C_inf + A*exp(-(t - t_last)/tau) (see the module docstring); bound |A|/C_inf.

    Needs MIN_FIT_READINGS readings spread over time; ValueError otherwise.
    """
    t = np.asarray(t_s, dtype=float)
    c = np.asarray(C_F, dtype=float)
    if t.size != c.size or t.size < MIN_FIT_READINGS or np.ptp(t) <= 0:
        raise ValueError(f"a residual estimate needs {MIN_FIT_READINGS} or more readings "
                         "spread over time")
    span = float(np.ptp(t))
    scale = float(np.mean(c))
    y = c / scale - 1.0
    dt = t[-1] - t  # >= 0: age of each reading relative to the latest
    taus = np.geomspace(RESIDUAL_TAU_MIN_FRAC * span, max(max_tau_s, span), RESIDUAL_TAU_GRID)
    rows = []
    for tau in taus:
        X = np.column_stack([np.ones_like(dt), np.exp(np.minimum(dt / tau, 700.0))])
        coef, _, rank, _ = np.linalg.lstsq(X, y, rcond=None)
        if rank < 2:
            continue
        r = y - X @ coef
        ssr = float(r @ r)
        try:
            cov = np.linalg.inv(X.T @ X)
        except np.linalg.LinAlgError:
            continue
        rows.append((tau, ssr, float(coef[0]), float(coef[1]), float(cov[1, 1])))
    if not rows:
        raise ValueError("a residual estimate needs readings spread over time")
    dof = t.size - 3
    ssr_min = min(r[1] for r in rows)
    # the scatter of one reading: from the fit, or from successive differences (which a
    # smooth drift hardly touches [published: J. von Neumann, Ann. Math. Stat. 12, 367
    # (1941), mean square successive difference]), whichever is larger: a fit that happens
    # to follow the noise must not make the profile look narrower than it is
    var = max(ssr_min / dof, float(np.mean(np.diff(y) ** 2)) / 2.0, 1e-300)
    kept = [r for r in rows if r[1] <= ssr_min + RESIDUAL_PROFILE_DSSR * var]
    best = min(rows, key=lambda r: r[1])
    bound = max(abs(A) + RESIDUAL_MARGIN_SE * math.sqrt(var * vA) for _, _, _, A, vA in kept)
    c_inf = 1.0 + best[2]
    return ResidualEstimate(100.0 * bound / c_inf, float(best[0]), float(max(r[0] for r in kept)),
                            int(t.size), span)


class SettleResult(float):
    """The settle time in seconds (a float, so an engine that only wants the time gets it),
    with the final drift estimate and whether the maximum dwell was hit."""

    def __new__(cls, settle_s: float, drift: DriftEstimate | None, hit_max_dwell: bool,
                n_readings: int, prediction: Prediction | None = None,
                fit_from_s: float | None = None):
        obj = super().__new__(cls, settle_s)
        obj.drift = drift
        obj.hit_max_dwell = bool(hit_max_dwell)
        obj.n_readings = int(n_readings)
        obj.prediction = prediction  # the predicted settled value (prediction rule), or None
        obj.fit_from_s = fit_from_s  # clock time of the first reading the prediction used
        return obj

    @property
    def settle_s(self) -> float:
        return float(self)

    @property
    def drift_pct_per_s(self) -> float | None:
        return None if self.drift is None else self.drift.drift_pct_per_s

    @property
    def flags(self) -> tuple[str, ...]:
        return (MAX_DWELL_FLAG,) if self.hit_max_dwell else ()

    def __repr__(self) -> str:
        d = "unknown" if self.drift is None else f"{self.drift.drift_pct_per_s:+.4g} %/s"
        return (f"SettleResult({float(self):.3f} s, drift {d}, "
                f"{'max dwell hit' if self.hit_max_dwell else 'settled'})")


class SettleDetector:
    """Dwell policy "settle": wait until the drift is below a threshold, or the maximum dwell.

    Used by the sweep engine like any dwell policy: `wait(clock, probe)` with probe() one
    meter reading of C in farads. `dwell_s` is the longest it may wait (max_dwell_s).
    """

    name = "settle"

    def __init__(self, max_drift_pct_per_s: float | None, max_dwell_s: float,
                 min_dwell_s: float = 0.5, window_s: float = 2.0, read_interval_s: float = 0.0,
                 max_residual_pct_of_reading: float | None = None, max_tau_s: float = 20.0,
                 max_residual_pct_of_C0: float | None = None,
                 max_prediction_u_pct_of_C0: float | None = None,
                 feed_R_ohm: float | None = None,
                 charge_time_constants: float = CHARGE_TIME_CONSTANTS):
        if (max_drift_pct_per_s is None and max_residual_pct_of_reading is None
                and max_residual_pct_of_C0 is None and max_prediction_u_pct_of_C0 is None):
            raise ValueError("settle: give max_drift_pct_per_s, max_residual_pct_of_reading, "
                             "max_residual_pct_of_C0 or max_prediction_u_pct_of_C0")
        checks = [("max_dwell_s", max_dwell_s), ("window_s", window_s), ("max_tau_s", max_tau_s)]
        if max_drift_pct_per_s is not None:
            checks.append(("max_drift_pct_per_s", max_drift_pct_per_s))
        if max_residual_pct_of_reading is not None:
            checks.append(("max_residual_pct_of_reading", max_residual_pct_of_reading))
        if max_residual_pct_of_C0 is not None:
            checks.append(("max_residual_pct_of_C0", max_residual_pct_of_C0))
        if max_prediction_u_pct_of_C0 is not None:
            checks.append(("max_prediction_u_pct_of_C0", max_prediction_u_pct_of_C0))
        if feed_R_ohm is not None:
            checks.append(("feed_R_ohm", feed_R_ohm))
        checks.append(("charge_time_constants", charge_time_constants))
        for label, v in checks:
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"settle: {label} must be a positive number, got {v!r}")
        for label, v in (("min_dwell_s", min_dwell_s), ("read_interval_s", read_interval_s)):
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v >= 0):
                raise ValueError(f"settle: {label} must be a number >= 0, got {v!r}")
        if min_dwell_s > max_dwell_s:
            raise ValueError(f"settle: min_dwell_s ({min_dwell_s:g} s) is above max_dwell_s "
                             f"({max_dwell_s:g} s)")
        self.max_drift_pct_per_s = (None if max_drift_pct_per_s is None
                                    else float(max_drift_pct_per_s))
        self.max_residual_pct_of_reading = (None if max_residual_pct_of_reading is None
                                            else float(max_residual_pct_of_reading))
        self.max_residual_pct_of_C0 = (None if max_residual_pct_of_C0 is None
                                       else float(max_residual_pct_of_C0))
        self.max_prediction_u_pct_of_C0 = (None if max_prediction_u_pct_of_C0 is None
                                           else float(max_prediction_u_pct_of_C0))
        self.max_tau_s = float(max_tau_s)
        self.tau_profile = TauProfile(self.max_tau_s, MIN_TAU_FRACTION_OF_MIN_DWELL
                                      * float(min_dwell_s))  # the sample's transients so far
        self.reference_C_F: float | None = None  # the sample's C0 (start_sample, wait)
        self.max_dwell_s = float(max_dwell_s)
        self.min_dwell_s = float(min_dwell_s)
        self.feed_R_ohm = None if feed_R_ohm is None else float(feed_R_ohm)
        self.charge_time_constants = float(charge_time_constants)
        self.charge_wait_s = self.min_dwell_s  # the sample's longest (start_sample)
        self.point_charge_wait_s = self.charge_wait_s  # the last dwell's own (charge_wait_at)
        self.window_s = float(window_s)
        self.read_interval_s = float(read_interval_s)
        self.last: SettleResult | None = None
        self.last_residual: ResidualEstimate | None = None

    @property
    def dwell_s(self) -> float:
        return self.max_dwell_s

    @classmethod
    def from_plan(cls, settle: dict) -> "SettleDetector":
        """From the plan's normalised [settle] table (benchkit.sweep.plan)."""
        return cls(settle.get("max_drift_pct_per_s"), settle["max_dwell_s"],
                   settle["min_dwell_s"], settle["window_s"], settle["read_interval_s"],
                   settle.get("max_residual_pct_of_reading"), settle.get("max_tau_s", 20.0),
                   settle.get("max_residual_pct_of_C0"),
                   settle.get("max_prediction_u_pct_of_C0"), settle.get("feed_R_ohm"),
                   settle.get("charge_time_constants", CHARGE_TIME_CONSTANTS))

    @property
    def predicts(self) -> bool:
        """True when the point records the predicted settled value (prediction rule)."""
        return self.max_prediction_u_pct_of_C0 is not None

    def start_sample(self, C_max_F: float | None = None) -> None:
        """A new sample: its first settled reading becomes its C0; a new dielectric, so its
        relaxation time is learnt afresh; and its own charge wait (charge_wait_for), from
        the largest C its part may have (C_max_F: the top of its tolerance)."""
        self.reference_C_F = None
        self.charge_wait_s = charge_wait_for(self.min_dwell_s, self.feed_R_ohm, C_max_F,
                                             self.charge_time_constants, self.max_dwell_s)
        self.tau_profile = TauProfile(self.max_tau_s,
                                      MIN_TAU_FRACTION_OF_MIN_DWELL * self.charge_wait_s)

    def charge_wait_at(self, C_F: float | None) -> float:
        """The charge wait for a part that reads C_F at this bias (module docstring, "Charge
        wait"); the sample's longest wait without a feed resistor or a usable reading."""
        if self.feed_R_ohm is None or C_F is None or not (0 < C_F < 1e30):
            return self.charge_wait_s
        wait = charge_wait_for(self.min_dwell_s, self.feed_R_ohm, CHARGE_C_MARGIN * C_F,
                               self.charge_time_constants, self.max_dwell_s)
        return min(wait, self.charge_wait_s)

    def settled(self, est: DriftEstimate) -> bool:
        """The drift rule: the drift, one standard error to the bad side, is within the
        threshold (always true when the plan gives no drift threshold)."""
        if self.max_drift_pct_per_s is None:
            return True
        return (abs(est.drift_pct_per_s) + DRIFT_MARGIN_SE * est.u_drift_pct_per_s
                <= self.max_drift_pct_per_s)

    def residual_ok(self, times, values, t0: float) -> bool:
        """The residual rule on the dwell's readings from the charge wait on (module docstring);
        always true when the plan gives no residual threshold."""
        if self.max_residual_pct_of_reading is None and self.max_residual_pct_of_C0 is None:
            return True
        lo = t0 + self.point_charge_wait_s - 1e-9
        k = next((i for i, t in enumerate(times) if t >= lo), len(times))
        t, c = times[k:], values[k:]
        if len(t) < MIN_FIT_READINGS or t[-1] - t[0] < self.window_s * (1 - 1e-9):
            return False
        res = self.last_residual = relaxation_residual(t, c, self.max_tau_s)
        if (self.max_residual_pct_of_reading is not None
                and res.residual_pct > self.max_residual_pct_of_reading):
            return False
        if self.max_residual_pct_of_C0 is not None:
            ref = self.reference_C_F or float(np.mean(c))
            return res.residual_pct * float(np.mean(c)) / ref <= self.max_residual_pct_of_C0
        return True

    def wait(self, clock, probe: Callable[[], float]) -> SettleResult:
        """Read until settled or max_dwell_s has passed since the call; return how long it took."""
        if self.predicts:
            return self._wait_predicting(clock, probe)
        t0 = clock.now()
        self.last_residual = None
        times: list[float] = []
        values: list[float] = []
        est: DriftEstimate | None = None
        t_prev = t0
        C_seen = None  # the largest reading of this dwell (its charge wait)
        self.point_charge_wait_s = self.charge_wait_s
        while True:
            if clock.now() - t0 >= self.max_dwell_s:
                self.last = SettleResult(clock.now() - t0, est, True, len(times))
                return self.last
            c = probe()
            t = clock.now()
            if c is not None and math.isfinite(c) and 0 < c < 1e30:  # 9.9E37 = overload
                times.append(t)
                values.append(float(c))
                C_seen = float(c) if C_seen is None else max(C_seen, float(c))
                self.point_charge_wait_s = self.charge_wait_at(C_seen)
            est = self._estimate(times, values, t) or est
            if (est is not None and t - t0 >= self.point_charge_wait_s and self.settled(est)
                    and self.residual_ok(times, values, t0)):
                self.last = SettleResult(t - t0, est, False, len(times))
                if self.reference_C_F is None:
                    self.reference_C_F = est.mean_C_F
                return self.last
            if self.read_interval_s:
                clock.sleep(self.read_interval_s)
            elif t <= t_prev:
                clock.sleep(IDLE_READ_INTERVAL_S)  # a reading that took no clock time
            t_prev = t

    def _wait_predicting(self, clock, probe: Callable[[], float]) -> SettleResult:
        """The prediction rule (module docstring): read until the predicted settled value is
        known well enough, or max_dwell_s; the transient then joins the sample's tau profile."""
        t0 = clock.now()
        # with a feed resistor the first reading, as the ramp ends, sizes the charge wait
        sized = self.feed_R_ohm is None
        self.point_charge_wait_s = self.charge_wait_s
        lo = t0 + self.charge_wait_s - 1e-9
        times: list[float] = []
        values: list[float] = []
        pred: Prediction | None = None
        est: DriftEstimate | None = None
        t_prev = t0
        hit_max = False
        C_seen = None  # the largest reading of this dwell (its charge wait)
        while True:
            if clock.now() - t0 >= self.max_dwell_s:
                hit_max = True
                break
            if sized and clock.now() < lo:  # charging through the fixture: nothing to read yet
                clock.sleep(lo - clock.now())
                continue
            c = probe()
            t = clock.now()
            if c is not None and math.isfinite(c) and 0 < c < 1e30:
                if self.feed_R_ohm is not None and (C_seen is None or c > C_seen):
                    C_seen = float(c)  # a larger C than read so far: a longer charge
                    self.point_charge_wait_s = self.charge_wait_at(C_seen)
                    lo = t0 + self.point_charge_wait_s - 1e-9
                    keep = [i for i, ti in enumerate(times) if ti >= lo]
                    times, values = [times[i] for i in keep], [values[i] for i in keep]
                if t >= lo:
                    times.append(t)
                    values.append(float(c))
            sized = True
            if len(times) >= MIN_PREDICT_READINGS and times[-1] > times[0]:
                pred = self.tau_profile.predict(times, values)
                est = window_drift(times, values)
                ref = self.reference_C_F or pred.C_inf_F
                if 100.0 * pred.u_C_inf_F / ref <= self.max_prediction_u_pct_of_C0:
                    break
            if self.read_interval_s:
                clock.sleep(self.read_interval_s)
            elif t <= t_prev:
                clock.sleep(IDLE_READ_INTERVAL_S)  # a reading that took no clock time
            t_prev = t
        if pred is not None:
            self.tau_profile.add(times, values)
            if self.reference_C_F is None and not hit_max:
                self.reference_C_F = pred.C_inf_F
        self.last = SettleResult(clock.now() - t0, est, hit_max, len(times), pred,
                                 times[0] if times else None)
        return self.last

    def turn_wait(self, clock, probe: Callable[[], float]) -> SettleResult:
        """At a turning point of an adaptive loop (nothing is recorded there): with the
        prediction rule only the charging through the fixture (the charge wait), as the
        relaxation still under way decays with the dielectric's own time constant and the
        next point's fit reads it off with its own; the other rules wait as for a point."""
        if not self.predicts:
            return self.wait(clock, probe)
        t0 = clock.now()
        wait = self.charge_wait_s
        if self.feed_R_ohm is not None:  # sized by one reading at the turn (module docstring)
            c = probe()
            if c is not None and math.isfinite(c) and 0 < c < 1e30:
                wait = self.charge_wait_at(float(c))
        self.point_charge_wait_s = wait
        if clock.now() < t0 + wait:
            clock.sleep(t0 + wait - clock.now())
        self.last = SettleResult(clock.now() - t0, None, False, 0)
        return self.last

    def _estimate(self, times, values, now) -> DriftEstimate | None:
        """Drift over the last window_s of readings, once the readings span a full window."""
        if not times or times[-1] - times[0] < self.window_s * (1 - 1e-9):
            return None
        lo = now - self.window_s * (1 + 1e-9)
        k = next(i for i, t in enumerate(times) if t >= lo)
        k = max(0, min(k, len(times) - MIN_WINDOW_READINGS))
        t, c = times[k:], values[k:]
        if len(t) < MIN_WINDOW_READINGS or t[-1] - t[0] <= 0:
            return None
        return window_drift(t, c)


__all__ = ["SettleDetector", "charge_wait_for", "largest_C_F",
           "CHARGE_TIME_CONSTANTS", "CHARGE_C_MARGIN", "Prediction", "SettleResult",
           "DriftEstimate", "window_drift",
           "ResidualEstimate", "relaxation_residual", "MIN_FIT_READINGS",
           "MAX_DWELL_FLAG", "MIN_WINDOW_READINGS", "DRIFT_MARGIN_SE"]
